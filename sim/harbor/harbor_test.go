package harbor

import (
	"math"
	"strings"
	"testing"

	"baton/sim/model"
)

func TestBadFiles(t *testing.T) {
	cases := []struct{ name, src, want string }{
		{"unknown key", "width: 4\ncolour: blue\n", "h.yaml:2: unknown field \"colour\""},
		{"wrong type", "width: wide\n", "h.yaml:1:"},
		{"zero width", "width: 0\n", "h.yaml:1: width: must be between 1 and 1000, got 0"},
		{"one cell", "width: 1\nheight: 1\n", "h.yaml:1: width: a 1 x 1 harbor has no room to move"},
		{"dock outside", "width: 4\nheight: 4\ndock: [4, 0]\n", "h.yaml:3: dock: cell (4,0) is outside the 4 x 4 grid"},
		{"start outside", "width: 4\nheight: 4\nrobots: 2\nstarts:\n  - [0, 0]\n  - [1, 9]\n", "h.yaml:6: starts[1]: cell (1,9) is outside the 4 x 4 grid"},
		{"starts count", "robots: 3\nstarts: [[0, 0]]\n", "h.yaml:2: starts: lists 1 launch cells for 3 boats"},
		{"scatter and starts", "robots: 1\nstarts: [[0, 0]]\nscatter: true\n", "h.yaml:3: scatter: cannot be combined with starts"},
		{"drift", "drift: 1.5\n", "h.yaml:1: drift: is a probability and must be in [0,1], got 1.5"},
		{"current", "current: NE\n", "h.yaml:1: current: must be one of N, S, E, W"},
		{"bias", "current_bias: -1\n", "h.yaml:1: current_bias: must be a finite number >= 0"},
		{"discount", "discount: 0\n", "h.yaml:1: discount: must be in (0,1], got 0"},
		{"horizon", "horizon: 0\n", "h.yaml:1: horizon: must be between 1 and 100000 steps"},
		{"slicks", "slicks: 0\n", "h.yaml:1: slicks: must be between 1 and 1000, got 0"},
		{"slick cells count", "slicks: 2\nslick_cells: [[1, 1]]\n", "h.yaml:2: slick_cells: lists 1 cells but slicks is 2"},
		{"slick cell outside", "width: 3\nheight: 3\nslicks: 1\nslick_cells: [[3, 3]]\n", "h.yaml:4: slick_cells[0]: cell (3,3) is outside the 3 x 3 grid"},
		{"robots", "robots: -2\n", "h.yaml:1: robots: must be between 1 and 256, got -2"},
		{"syntax", "width: [4\n", "h.yaml:"},
		{"empty", "", "h.yaml: file is empty"},
	}
	for _, c := range cases {
		_, err := Parse("h.yaml", []byte(c.src), 0)
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: err = %v\nwant it to contain %q", c.name, err, c.want)
		}
	}
	// Overriding the boat count against a start list is an error too.
	if _, err := Parse("h.yaml", []byte("robots: 1\nstarts: [[0, 0]]\n"), 3); err == nil ||
		!strings.Contains(err.Error(), "h.yaml:2: starts: lists 1 launch cells but 3 boats were asked for") {
		t.Errorf("override vs starts: %v", err)
	}
}

func TestSlickCellsSetCount(t *testing.T) {
	m, err := Parse("h.yaml", []byte("slick_cells: [[1, 1], [2, 2]]\n"), 0)
	if err != nil {
		t.Fatal(err)
	}
	if m.Config().Slicks != 2 {
		t.Fatalf("slick_cells without slicks should set the count: got %d", m.Config().Slicks)
	}
}

func tiny(t *testing.T, src string) *Model {
	t.Helper()
	m, err := Parse("t.yaml", []byte(src), 0)
	if err != nil {
		t.Fatal(err)
	}
	return m
}

func TestBasePolicy(t *testing.T) {
	m := tiny(t, "width: 5\nheight: 5\nrobots: 3\nstarts: [[0,0],[4,4],[2,2]]\nslicks: 2\nslick_cells: [[2,0],[2,4]]\ndrift: 0\n")
	s := m.NewState()
	m.Start(s, model.NewRNG(1).Rand)
	// Boat 0 at (0,0): nearest slick (2,0) -> east. Boat 1 at (4,4): (2,4) -> west.
	// Boat 2 at (2,2): tie at distance 2; lower cell index is (2,0) -> south.
	want := []int{East, West, South}
	for r, w := range want {
		if got := m.Base(s, r); got != w {
			t.Errorf("boat %d: base = %s, want %s", r, controlNames[got], controlNames[w])
		}
	}
	// Co-located boats pick the same slick: the herding the method fixes.
	h := tiny(t, "width: 6\nheight: 6\nrobots: 4\nslicks: 3\nslick_cells: [[5,5],[0,3],[3,0]]\ndrift: 0\n")
	hs := h.NewState()
	h.Start(hs, nil)
	for r := 1; r < 4; r++ {
		if h.Base(hs, r) != h.Base(hs, 0) {
			t.Fatal("co-located boats should make the same base move")
		}
	}
}

func TestStepCollectsAndEnds(t *testing.T) {
	m := tiny(t, "width: 3\nheight: 1\nrobots: 1\nslicks: 1\nslick_cells: [[2,0]]\ndrift: 0\n")
	s := m.NewState()
	m.Start(s, nil)
	rng := model.NewRNG(3).Rand
	total := 0.0
	steps := 0
	for !m.Terminal(s) && steps < 10 {
		total += m.Step(s, []int{m.Base(s, 0)}, rng)
		steps++
	}
	// Two moves east: after the first the slick is still out (cost 1), after
	// the second it is collected (cost 0).
	if steps != 2 || total != 1 {
		t.Fatalf("steps=%d cost=%g, want 2 and 1", steps, total)
	}
	if m.Step(s, []int{East}, rng) != 0 {
		t.Fatal("a terminal state must cost nothing")
	}
}

// The empirical distribution of Step must match Outcomes: 20000 samples,
// each probability within 4.5 binomial standard errors.
func TestOutcomesMatchStep(t *testing.T) {
	m := tiny(t, "width: 3\nheight: 3\nrobots: 1\nslicks: 2\nslick_cells: [[1,1],[0,2]]\ndrift: 0.6\ncurrent: N\ncurrent_bias: 1.5\n")
	s := m.NewState()
	m.Start(s, nil)
	u := []int{East}
	probs := map[string]float64{}
	sum := 0.0
	m.Outcomes(s, u, func(next model.State, p, cost float64) {
		probs[m.Key(next)] += p
		sum += p
		if cost != 2 {
			t.Errorf("cost %g, want 2", cost)
		}
	})
	if math.Abs(sum-1) > 1e-12 {
		t.Fatalf("outcome probabilities sum to %g", sum)
	}
	const n = 20000
	counts := map[string]int{}
	rng := model.NewRNG(11).Rand
	x := m.NewState()
	for range n {
		m.CopyState(x, s)
		m.Step(x, u, rng)
		counts[m.Key(x)]++
	}
	for k, c := range counts {
		if probs[k] == 0 {
			t.Fatalf("Step reached a state Outcomes does not list")
		}
		p := probs[k]
		se := math.Sqrt(p * (1 - p) / n)
		if d := math.Abs(float64(c)/n - p); d > 4.5*se+1e-9 {
			t.Errorf("outcome p=%.4f seen %.4f (%.1f se)", p, float64(c)/n, d/se)
		}
	}
}

func TestNoAllocs(t *testing.T) {
	m, _ := Default(6)
	s := m.NewState()
	rng := model.NewRNG(5)
	m.Start(s, rng.Rand)
	u := make([]int, m.Robots())
	allocs := testing.AllocsPerRun(200, func() {
		if m.Terminal(s) {
			m.Start(s, rng.Rand)
		}
		model.BaseJoint(m, s, u)
		m.Step(s, u, rng.Rand)
	})
	if allocs != 0 {
		t.Fatalf("Step+Base allocate %.1f times per step", allocs)
	}
}

func TestRandomTinyIsSmall(t *testing.T) {
	for seed := uint64(1); seed <= 50; seed++ {
		m := RandomTiny(seed)
		if m.Discount() >= 1 {
			t.Fatal("exact checks need a discount below 1")
		}
		c := m.Config()
		if pow(c.Width*c.Height, c.Robots)*multisets(c.Width*c.Height, c.Slicks) > 1500 {
			t.Fatal("too large")
		}
	}
}

func BenchmarkStep(b *testing.B) {
	m, _ := Default(4)
	s := m.NewState()
	rng := model.NewRNG(5)
	m.Start(s, rng.Rand)
	u := make([]int, m.Robots())
	b.ReportAllocs()
	for b.Loop() {
		if m.Terminal(s) {
			m.Start(s, rng.Rand)
		}
		model.BaseJoint(m, s, u)
		m.Step(s, u, rng.Rand)
	}
	b.ReportMetric(float64(b.N*m.Robots())/b.Elapsed().Seconds(), "robot-steps/s")
}

// No random tiny instance is already finished at its start.
func TestRandomTinyNotTrivial(t *testing.T) {
	for seed := uint64(1); seed <= 50; seed++ {
		m := RandomTiny(seed)
		s := m.NewState()
		m.Start(s, nil)
		if m.Terminal(s) || s.(*State).Left != m.Config().Slicks {
			t.Fatalf("seed %d: slicks collected at the start", seed)
		}
	}
}

// Boats covering every cell must not stall the start (slicks then land on
// boats and are collected at once).
func TestStartWhenBoatsCoverTheGrid(t *testing.T) {
	m := tiny(t, "width: 2\nheight: 1\nrobots: 2\nstarts: [[0,0],[1,0]]\nslicks: 1\n")
	s := m.NewState()
	m.Start(s, model.NewRNG(1).Rand)
	if !m.Terminal(s) {
		t.Fatal("a slick on a boat should be collected at the start")
	}
	sc := tiny(t, "width: 2\nheight: 1\nrobots: 2\nscatter: true\nslicks: 1\n")
	for seed := uint64(1); seed <= 20; seed++ {
		sc.Start(s, model.NewRNG(seed).Rand)
	}
}

// BaseAll, the live slicks gathered once for the whole fleet, gives every
// boat Base's control: seeded harbors of 1..70 boats, scattered or from the
// dock (boats sharing cells), with 8 or 20 slicks (past the gathered
// bound), stepped along with random controls.
func TestBaseAllIsBase(t *testing.T) {
	for seed := uint64(1); seed <= 40; seed++ {
		cfg := Defaults()
		cfg.Robots = 1 + int(seed*7%70)
		cfg.Scatter = seed%2 == 1 // else from the dock: boats sharing cells
		if seed%3 == 0 {
			cfg.Slicks = 20 // more live slicks than BaseAll gathers
		}
		m, err := New(cfg)
		if err != nil {
			t.Fatal(err)
		}
		rng := model.NewRNG(seed)
		s := m.NewState()
		m.Start(s, rng.Rand)
		u := make([]int, m.Robots())
		for step := 0; step < 30 && !m.Terminal(s); step++ {
			m.BaseAll(s, u)
			for r := range u {
				if want := m.Base(s, r); u[r] != want {
					t.Fatalf("seed %d step %d boat %d: BaseAll %d, Base %d", seed, step, r, u[r], want)
				}
				u[r] = rng.IntN(numControls)
			}
			m.Step(s, u, rng.Rand)
		}
	}
}

// The drift direction by precomputed cuts is the direction by division,
// for every uniform: checked on both sides of every cut (where a rounding
// difference would show) and on a million seeded uniforms, for drifts and
// currents of several kinds.
func TestDriftCutsAreDivision(t *testing.T) {
	rng := model.NewRNG(3)
	for _, d := range []float64{0.3, 1, 0.1, 1.0 / 3, 0.7, 1e-9, 0.999999} {
		for _, cur := range []string{"", "N", "S", "E", "W"} {
			cfg := Defaults()
			cfg.Drift, cfg.Current = d, cur
			m, err := New(cfg)
			if err != nil {
				t.Fatal(err)
			}
			check := func(r float64) {
				if r < 0 || r >= d {
					return
				}
				if got, want := m.driftDirection(r), m.direction(r/d); got != want {
					t.Fatalf("drift %v current %q r %v: cuts give %d, division %d", d, cur, r, got, want)
				}
			}
			for _, c := range m.dirCut {
				for _, r := range []float64{c, math.Nextafter(c, 0), math.Nextafter(c, 2)} {
					check(r)
				}
			}
			for range 1_000_000 / 35 {
				check(rng.Float64() * d)
			}
		}
	}
}
