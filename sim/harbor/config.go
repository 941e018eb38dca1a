package harbor

import (
	"fmt"
	"math"
	"slices"
	"strings"

	"baton/sim/config"
	"baton/sim/model"
)

// Config is the YAML form of a harbor. Zero values mean "use the default".
type Config struct {
	Width  int `yaml:"width"`
	Height int `yaml:"height"`
	Robots int `yaml:"robots"`
	// Dock is the cell all boats launch from unless Starts or Scatter say otherwise.
	Dock [2]int `yaml:"dock"`
	// Starts gives one launch cell per boat.
	Starts [][2]int `yaml:"starts"`
	// Scatter launches boats from random cells drawn per episode.
	Scatter bool `yaml:"scatter"`
	// Slicks is the number of slicks; SlickCells fixes their first cells,
	// otherwise they are drawn per episode.
	Slicks     int      `yaml:"slicks"`
	SlickCells [][2]int `yaml:"slick_cells"`
	// Drift is the probability a slick moves each step.
	Drift float64 `yaml:"drift"`
	// Current is the direction (N, S, E, W, or empty for none) drift favours,
	// by CurrentBias extra weight against 1 for each direction.
	Current     string  `yaml:"current"`
	CurrentBias float64 `yaml:"current_bias"`
	Discount    float64 `yaml:"discount"`
	Horizon     int     `yaml:"horizon"`
}

// Defaults is the demo harbor: 10 x 10, eight slicks, one dock in a corner,
// a light easterly current.
func Defaults() Config {
	return Config{Width: 10, Height: 10, Robots: 4, Slicks: 8, Drift: 0.3,
		Current: "E", CurrentBias: 1, Discount: 1, Horizon: 80}
}

// Default returns the demo harbor with the given number of boats (0: default).
func Default(robots int) (*Model, error) {
	cfg := Defaults()
	if robots > 0 {
		cfg.Robots = robots
	}
	return New(cfg)
}

// Load reads a harbor file; fields it leaves out take Defaults. robots > 0
// overrides the file's boat count.
func Load(path string, robots int) (*Model, error) {
	cfg := Defaults()
	doc, err := config.ReadFile(path, &cfg)
	if err != nil {
		return nil, err
	}
	return fromDoc(doc, cfg, robots)
}

// Parse is Load on bytes; name appears in error messages.
func Parse(name string, data []byte, robots int) (*Model, error) {
	cfg := Defaults()
	doc, err := config.Parse(name, data, &cfg)
	if err != nil {
		return nil, err
	}
	return fromDoc(doc, cfg, robots)
}

func fromDoc(doc *config.Doc, cfg Config, robots int) (*Model, error) {
	if robots > 0 {
		if len(cfg.Starts) > 0 && len(cfg.Starts) != robots {
			return nil, doc.Errorf("starts", "lists %d launch cells but %d boats were asked for", len(cfg.Starts), robots)
		}
		cfg.Robots = robots
	}
	// Listing slick cells without a count means "these slicks".
	if len(cfg.SlickCells) > 0 && !doc.Has("slicks") {
		cfg.Slicks = len(cfg.SlickCells)
	}
	if err := cfg.Validate(doc); err != nil {
		return nil, err
	}
	return newModel(cfg), nil
}

// Validate checks ranges; doc (may be nil) locates the offending line.
func (c Config) Validate(doc *config.Doc) error {
	in := func(p [2]int) bool { return p[0] >= 0 && p[0] < c.Width && p[1] >= 0 && p[1] < c.Height }
	switch {
	case c.Width < 1 || c.Width > 1000:
		return doc.Errorf("width", "must be between 1 and 1000, got %d", c.Width)
	case c.Height < 1 || c.Height > 1000:
		return doc.Errorf("height", "must be between 1 and 1000, got %d", c.Height)
	case c.Width*c.Height < 2:
		return doc.Errorf("width", "a 1 x 1 harbor has no room to move")
	case c.Robots < 1 || c.Robots > 256:
		return doc.Errorf("robots", "must be between 1 and 256, got %d", c.Robots)
	case !in(c.Dock):
		return doc.Errorf("dock", "cell (%d,%d) is outside the %d x %d grid", c.Dock[0], c.Dock[1], c.Width, c.Height)
	case len(c.Starts) > 0 && len(c.Starts) != c.Robots:
		return doc.Errorf("starts", "lists %d launch cells for %d boats", len(c.Starts), c.Robots)
	case len(c.Starts) > 0 && c.Scatter:
		return doc.Errorf("scatter", "cannot be combined with starts")
	case c.Slicks < 1 || c.Slicks > 1000:
		return doc.Errorf("slicks", "must be between 1 and 1000, got %d", c.Slicks)
	case math.IsNaN(c.Drift) || c.Drift < 0 || c.Drift > 1:
		return doc.Errorf("drift", "is a probability and must be in [0,1], got %g", c.Drift)
	case c.Current != "" && (len(c.Current) != 1 || !strings.Contains("NSEW", c.Current)):
		return doc.Errorf("current", "must be one of N, S, E, W (or left out), got %q", c.Current)
	case math.IsNaN(c.CurrentBias) || math.IsInf(c.CurrentBias, 0) || c.CurrentBias < 0:
		return doc.Errorf("current_bias", "must be a finite number >= 0, got %g", c.CurrentBias)
	case math.IsNaN(c.Discount) || c.Discount <= 0 || c.Discount > 1:
		return doc.Errorf("discount", "must be in (0,1], got %g", c.Discount)
	case c.Horizon < 1 || c.Horizon > 100000:
		return doc.Errorf("horizon", "must be between 1 and 100000 steps, got %d", c.Horizon)
	}
	for i, p := range c.Starts {
		if !in(p) {
			return doc.Errorf(field("starts", i), "cell (%d,%d) is outside the %d x %d grid", p[0], p[1], c.Width, c.Height)
		}
	}
	if len(c.SlickCells) > 0 {
		if len(c.SlickCells) != c.Slicks {
			return doc.Errorf("slick_cells", "lists %d cells but slicks is %d", len(c.SlickCells), c.Slicks)
		}
		for i, p := range c.SlickCells {
			if !in(p) {
				return doc.Errorf(field("slick_cells", i), "cell (%d,%d) is outside the %d x %d grid", p[0], p[1], c.Width, c.Height)
			}
		}
	}
	return nil
}

func field(name string, i int) string { return fmt.Sprintf("%s[%d]", name, i) }

// RandomTiny is a random, tiny, discounted harbor for exact checks: at most
// a few hundred to ~1500 reachable states, fixed start cells, seeded.
func RandomTiny(seed uint64) *Model {
	rng := model.NewRNG(seed)
	for {
		c := Config{
			Width:       2 + rng.IntN(2),
			Height:      1 + rng.IntN(3),
			Robots:      1 + rng.IntN(2),
			Slicks:      1 + rng.IntN(2),
			Drift:       rng.Float64() * 0.6,
			Discount:    0.8 + 0.15*rng.Float64(),
			Horizon:     50,
			CurrentBias: 0,
		}
		if rng.IntN(2) == 0 {
			c.Current = string("NSEW"[rng.IntN(4)])
			c.CurrentBias = 2 * rng.Float64()
		}
		cells := c.Width * c.Height
		if cells < 2 {
			continue
		}
		// Boats^cells times slick multisets (with "collected") bounds the states.
		states := pow(cells, c.Robots) * multisets(cells, c.Slicks)
		if states > 1500 {
			continue
		}
		c.Dock = [2]int{rng.IntN(c.Width), rng.IntN(c.Height)}
		if rng.IntN(2) == 0 {
			for range c.Robots {
				c.Starts = append(c.Starts, [2]int{rng.IntN(c.Width), rng.IntN(c.Height)})
			}
		}
		// Slicks start at least two steps from every boat, so no instance is
		// over after its first step and the checks have something to check.
		boats := c.Starts
		if len(boats) == 0 {
			boats = [][2]int{c.Dock}
		}
		var far [][2]int
		for x := range c.Width {
			for y := range c.Height {
				p := [2]int{x, y}
				if !slices.ContainsFunc(boats, func(b [2]int) bool { return abs(b[0]-p[0])+abs(b[1]-p[1]) < 2 }) {
					far = append(far, p)
				}
			}
		}
		if len(far) == 0 {
			continue
		}
		for range c.Slicks {
			c.SlickCells = append(c.SlickCells, far[rng.IntN(len(far))])
		}
		m, err := New(c)
		if err != nil {
			panic("harbor: RandomTiny made an invalid config: " + err.Error())
		}
		return m
	}
}

func pow(b, e int) int {
	r := 1
	for range e {
		r *= b
	}
	return r
}

// multisets counts multisets of size <= k over n cells.
func multisets(n, k int) int {
	total := 0
	for j := 0; j <= k; j++ {
		total += binom(n+j-1, j)
	}
	return total
}

func binom(n, k int) int {
	r := 1
	for i := 1; i <= k; i++ {
		r = r * (n - k + i) / i
	}
	return r
}

// WithStarts is m with boat r launching from cell starts[r] = {x, y}, one
// per boat.
func WithStarts(m *Model, starts [][2]int) (*Model, error) {
	cfg := m.Config()
	cfg.Starts, cfg.Scatter = starts, false
	if err := cfg.Validate(nil); err != nil {
		return nil, err
	}
	return newModel(cfg), nil
}
