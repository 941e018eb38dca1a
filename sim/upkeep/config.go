package upkeep

import (
	_ "embed"
	"fmt"
	"math"
	"strconv"
	"strings"

	"go.yaml.in/yaml/v3"

	"baton/sim/config"
)

// file is the YAML form of an instance; see sites/solar-park.yaml for a
// commented example. Optional fields are recognised by doc.Has, so a zero
// written in the file is validated rather than silently replaced.
type file struct {
	Levels         int        `yaml:"levels"`
	LevelCost      []float64  `yaml:"level_cost"`
	Wear           float64    `yaml:"wear"`
	ThresholdLevel int        `yaml:"threshold_level"`
	ThresholdProb  float64    `yaml:"threshold_prob"`
	Discount       float64    `yaml:"discount"`
	Horizon        int        `yaml:"horizon"`
	Observe        string     `yaml:"observe"`
	Robots         int        `yaml:"robots"`
	Start          yaml.Node  `yaml:"start"` // a site name or a list of them
	Sites          []fileSite `yaml:"sites"`
	Roads          [][]string `yaml:"roads"`
}

type fileSite struct {
	Name  string      `yaml:"name"`
	X     float64     `yaml:"x"`
	Y     float64     `yaml:"y"`
	Wear  float64     `yaml:"wear"`
	Chain [][]float64 `yaml:"chain"`
	Level int         `yaml:"level"`
}

// Defaults for fields a file leaves out.
const (
	defaultWear       = 0.05
	defaultThreshProb = 0.3
	defaultDiscount   = 0.95
	defaultHorizon    = 100
	maxRobots         = 256
	rowTolerance      = 1e-9
)

//go:embed sites/solar-park.yaml
var solarPark []byte

// Default is the embedded demo, a solar park's service roads; robots > 0
// overrides its four robots (all start at the depot).
func Default(robots int) (*Model, error) {
	return Parse("sites/solar-park.yaml", solarPark, robots)
}

// The documented allocation bound of one Parse of n bytes: AllocPerByte*n
// + AllocFixed. On top of sim/config's bound the model holds n x n hop and
// next-hop tables, 16 MB at maxSites, and each site's (L+1) x (L+1) chain
// twice.
const (
	AllocPerByte = config.AllocPerByte
	AllocFixed   = config.AllocFixed + 32<<20
)

// Load reads an instance file (at most config.MaxFileBytes); robots > 0
// overrides the file's robot count.
func Load(path string, robots int) (*Model, error) {
	data, err := config.ReadBytes(path)
	if err != nil {
		return nil, err
	}
	return Parse(path, data, robots)
}

// Parse is Load on bytes already read; name appears in error messages.
// robots > 0 overrides the file's robot count: with one start site all
// robots start there, with a start list the counts must agree.
func Parse(name string, data []byte, robots int) (*Model, error) {
	var f file
	doc, err := config.Parse(name, data, &f)
	if err != nil {
		return nil, err
	}
	sp, err := f.spec(doc, robots)
	if err != nil {
		return nil, err
	}
	return build(sp), nil
}

func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

func idx(field string, i int) string { return fmt.Sprintf("%s[%d]", field, i) }

// spec validates f; every error names the file, line and field.
func (f *file) spec(doc *config.Doc, robotsOverride int) (*spec, error) {
	sp := &spec{}
	if !doc.Has("levels") {
		return nil, doc.Errorf("levels", "missing: set the highest wear level L (1..%d)", MaxLevels)
	}
	L := f.Levels
	if L < 1 || L > MaxLevels {
		return nil, doc.Errorf("levels", "must be between 1 and %d, got %d", MaxLevels, L)
	}
	sp.levels = L
	k := L + 1
	if len(f.LevelCost) != k {
		return nil, doc.Errorf("level_cost", "has %d entries, want levels+1 = %d (one per level 0..%d)", len(f.LevelCost), k, L)
	}
	for i, c := range f.LevelCost {
		if !finite(c) || c < 0 {
			return nil, doc.Errorf(idx("level_cost", i), "must be a finite cost >= 0, got %g", c)
		}
	}
	sp.cost = f.LevelCost

	wear := defaultWear
	if doc.Has("wear") {
		wear = f.Wear
		if !(wear >= 0 && wear <= 1) {
			return nil, doc.Errorf("wear", "is a probability and must be in [0,1], got %g", wear)
		}
	}

	sp.threshLevel = (L + 1) / 2
	if doc.Has("threshold_level") {
		sp.threshLevel = f.ThresholdLevel
		if sp.threshLevel < 1 || sp.threshLevel > L {
			return nil, doc.Errorf("threshold_level", "must be between 1 and levels = %d, got %d", L, sp.threshLevel)
		}
	}
	sp.threshProb = defaultThreshProb
	if doc.Has("threshold_prob") {
		sp.threshProb = f.ThresholdProb
		if !(sp.threshProb >= 0 && sp.threshProb < 1) {
			return nil, doc.Errorf("threshold_prob", "must be in [0,1), got %g", sp.threshProb)
		}
	}
	sp.discount = defaultDiscount
	if doc.Has("discount") {
		sp.discount = f.Discount
		if !(sp.discount > 0 && sp.discount < 1) {
			return nil, doc.Errorf("discount", "must be in (0,1) (the problem never ends), got %g", sp.discount)
		}
	}
	sp.horizon = defaultHorizon
	if doc.Has("horizon") {
		sp.horizon = f.Horizon
		if sp.horizon < 1 || sp.horizon > 1000000 {
			return nil, doc.Errorf("horizon", "must be between 1 and 1000000 steps, got %d", sp.horizon)
		}
	}
	switch f.Observe {
	case "own":
	case "all":
		sp.observeAll = true
	case "":
		if doc.Has("observe") {
			return nil, doc.Errorf("observe", "must be own or all, got an empty value")
		}
	default:
		return nil, doc.Errorf("observe", "must be own or all, got %q", f.Observe)
	}

	if err := f.sites(doc, sp, wear); err != nil {
		return nil, err
	}
	if err := f.roads(doc, sp); err != nil {
		return nil, err
	}
	if err := f.start(doc, sp, robotsOverride); err != nil {
		return nil, err
	}
	return sp, nil
}

func (f *file) sites(doc *config.Doc, sp *spec, wear float64) error {
	L, k := sp.levels, sp.levels+1
	if len(f.Sites) == 0 {
		return doc.Errorf("sites", "no sites: list at least one {name: ..., x: ..., y: ...}")
	}
	if len(f.Sites) > maxSites {
		return doc.Errorf("sites", "at most %d sites, got %d", maxSites, len(f.Sites))
	}
	seen := map[string]int{}
	for i, s := range f.Sites {
		at := idx("sites", i)
		if s.Name == "" {
			return doc.Errorf(at+".name", "missing: every site needs a name")
		}
		if j, dup := seen[s.Name]; dup {
			return doc.Errorf(at+".name", "duplicate site name %q (also sites[%d])", s.Name, j)
		}
		seen[s.Name] = i
		if !finite(s.X) || !finite(s.Y) {
			return doc.Errorf(at, "x and y must be finite numbers")
		}
		level := 0
		if doc.Has(at + ".level") {
			level = s.Level
			if level < 0 || level > L {
				return doc.Errorf(at+".level", "initial level must be between 0 and %d, got %d", L, level)
			}
		}
		hasWear, hasChain := doc.Has(at+".wear"), doc.Has(at+".chain")
		var chain []float64
		switch {
		case hasWear && hasChain:
			return doc.Errorf(at+".chain", "give wear or chain, not both")
		case hasChain:
			var err error
			if chain, err = checkChain(doc, at+".chain", s.Chain, k); err != nil {
				return err
			}
		default:
			p := wear
			if hasWear {
				p = s.Wear
				if !(p >= 0 && p <= 1) {
					return doc.Errorf(at+".wear", "is a probability and must be in [0,1], got %g", p)
				}
			}
			chain = birthChain(L, p)
		}
		sp.names = append(sp.names, s.Name)
		sp.xy = append(sp.xy, [2]float64{s.X, s.Y})
		sp.chains = append(sp.chains, chain)
		sp.startLevel = append(sp.startLevel, level)
	}
	return nil
}

// birthChain goes up one level with probability p and sticks at L.
func birthChain(L int, p float64) []float64 {
	k := L + 1
	c := make([]float64, k*k)
	for i := range L {
		c[i*k+i] = 1 - p
		c[i*k+i+1] = p
	}
	c[L*k+L] = 1
	return c
}

func checkChain(doc *config.Doc, at string, rows [][]float64, k int) ([]float64, error) {
	if len(rows) != k {
		return nil, doc.Errorf(at, "has %d rows, want a %dx%d matrix (levels+1 rows)", len(rows), k, k)
	}
	c := make([]float64, 0, k*k)
	for i, row := range rows {
		ri := idx(at, i)
		if len(row) != k {
			return nil, doc.Errorf(ri, "has %d entries, want %d (levels+1)", len(row), k)
		}
		sum := 0.0
		for j, v := range row {
			if !finite(v) || v < 0 {
				return nil, doc.Errorf(ri, "entry %d is %g; probabilities must be >= 0", j, v)
			}
			sum += v
		}
		if math.Abs(sum-1) > rowTolerance {
			return nil, doc.Errorf(ri, "row sums to %.12g, want 1", sum)
		}
		// Rescale so beliefs keep summing to 1 over long runs: a row that is
		// off by 1e-10 would otherwise leak that much probability per step.
		// Rows already exact to rounding are kept as written.
		if math.Abs(sum-1) <= 1e-15 {
			sum = 1
		}
		for _, v := range row {
			c = append(c, v/sum)
		}
	}
	return c, nil
}

func (f *file) roads(doc *config.Doc, sp *spec) error {
	index := map[string]int{}
	for i, s := range sp.names {
		index[s] = i
	}
	n := len(sp.names)
	have := map[[2]int]int{}
	for i, r := range f.Roads {
		at := idx("roads", i)
		if len(r) != 2 {
			return doc.Errorf(at, "want [site, site], got %d names", len(r))
		}
		a, okA := index[r[0]]
		b, okB := index[r[1]]
		switch {
		case !okA:
			return doc.Errorf(at, "no site named %q", r[0])
		case !okB:
			return doc.Errorf(at, "no site named %q", r[1])
		case a == b:
			return doc.Errorf(at, "road from %q to itself", r[0])
		}
		key := [2]int{min(a, b), max(a, b)}
		if j, dup := have[key]; dup {
			return doc.Errorf(at, "duplicate road %s - %s (also roads[%d])", r[0], r[1], j)
		}
		have[key] = i
		sp.roads = append(sp.roads, [2]int{a, b})
	}
	// Connectivity from the first site; every robot must be able to reach
	// every site or the base policy's distances are meaningless.
	nbr := make([][]int, n)
	for _, r := range sp.roads {
		nbr[r[0]] = append(nbr[r[0]], r[1])
		nbr[r[1]] = append(nbr[r[1]], r[0])
	}
	reached := make([]bool, n)
	reached[0] = true
	queue := []int{0}
	for len(queue) > 0 {
		a := queue[0]
		queue = queue[1:]
		for _, v := range nbr[a] {
			if !reached[v] {
				reached[v] = true
				queue = append(queue, v)
			}
		}
	}
	for i, ok := range reached {
		if !ok {
			return doc.Errorf(idx("sites", i), "site %q cannot be reached from %q by roads (the graph must be connected)", sp.names[i], sp.names[0])
		}
	}
	return nil
}

func (f *file) start(doc *config.Doc, sp *spec, override int) error {
	var names []string
	list := false
	switch f.Start.Kind {
	case 0: // absent: everybody at the first site
		names = []string{sp.names[0]}
	case yaml.ScalarNode:
		names = []string{f.Start.Value}
	case yaml.SequenceNode:
		list = true
		for _, c := range f.Start.Content {
			if c.Kind != yaml.ScalarNode {
				return doc.Errorf("start", "want a site name or a list of site names")
			}
			names = append(names, c.Value)
		}
	default:
		return doc.Errorf("start", "want a site name or a list of site names")
	}
	robots := 1
	if doc.Has("robots") {
		robots = f.Robots
		if robots < 1 || robots > maxRobots {
			return doc.Errorf("robots", "must be between 1 and %d, got %d", maxRobots, robots)
		}
	} else if list {
		// A start list alone says how many robots there are, so it is held
		// to the robots field's bounds.
		robots = len(names)
		if robots < 1 || robots > maxRobots {
			return doc.Errorf("start", "lists %d sites, one per robot, but there must be 1 to %d robots", robots, maxRobots)
		}
	}
	if list {
		switch {
		case override > 0 && override != len(names):
			return doc.Errorf("start", "lists %d sites but %d robots were asked for; give one site or a list of %d", len(names), override, override)
		case len(names) != robots:
			return doc.Errorf("start", "lists %d sites for %d robots", len(names), robots)
		}
	}
	if override > 0 {
		if override > maxRobots {
			return doc.Errorf("robots", "at most %d robots, %d were asked for", maxRobots, override)
		}
		robots = override
	}
	var missing []string
	for _, s := range names {
		i, ok := indexOf(sp.names, s)
		if !ok {
			missing = append(missing, strconv.Quote(s))
			continue
		}
		if !list {
			for range robots {
				sp.startPos = append(sp.startPos, i)
			}
			continue
		}
		sp.startPos = append(sp.startPos, i)
	}
	if len(missing) > 0 {
		return doc.Errorf("start", "robots on missing sites: %s", strings.Join(missing, ", "))
	}
	return nil
}

func indexOf(a []string, s string) (int, bool) {
	for i, v := range a {
		if v == s {
			return i, true
		}
	}
	return -1, false
}

// Format writes m as an instance file that Parse reads back to the same
// model (chains written out in full, floats in shortest round-trip form);
// drills use it to record the exact instance they ran.
func (m *Model) Format() []byte {
	var b strings.Builder
	num := func(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }
	nums := func(v []float64) string {
		s := make([]string, len(v))
		for i, x := range v {
			s[i] = num(x)
		}
		return "[" + strings.Join(s, ", ") + "]"
	}
	fmt.Fprintf(&b, "levels: %d\nlevel_cost: %s\n", m.levels, nums(m.cost))
	fmt.Fprintf(&b, "threshold_level: %d\nthreshold_prob: %s\n", m.threshLevel, num(m.threshProb))
	fmt.Fprintf(&b, "discount: %s\nhorizon: %d\n", num(m.discount), m.horizon)
	obs := "own"
	if m.observeAll {
		obs = "all"
	}
	fmt.Fprintf(&b, "observe: %s\nrobots: %d\nstart: [", obs, m.robots)
	for r, p := range m.startPos {
		if r > 0 {
			b.WriteString(", ")
		}
		b.WriteString(strconv.Quote(m.names[p]))
	}
	b.WriteString("]\nsites:\n")
	k := m.k
	for s := range m.n {
		fmt.Fprintf(&b, "  - {name: %s, x: %s, y: %s, level: %d, chain: [", strconv.Quote(m.names[s]), num(m.xy[s][0]), num(m.xy[s][1]), m.startLevel[s])
		for i := range k {
			if i > 0 {
				b.WriteString(", ")
			}
			b.WriteString(nums(m.chain[(s*k+i)*k : (s*k+i+1)*k]))
		}
		b.WriteString("]}\n")
	}
	b.WriteString("roads:\n")
	for a := range m.n {
		for _, v := range m.nbr[a] {
			if a < v {
				fmt.Fprintf(&b, "  - [%s, %s]\n", strconv.Quote(m.names[a]), strconv.Quote(m.names[v]))
			}
		}
	}
	return []byte(b.String())
}
