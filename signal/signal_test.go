package signal_test

import (
	"fmt"
	"slices"
	"strings"
	"testing"

	"baton/agentd/decide"
	"baton/signal"
	"baton/sim/episode"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// small keeps the Monte Carlo cheap: exactness does not depend on effort.
var small = decide.Config{Samples: 4, Horizon: 6}

func harbor4(t *testing.T) *harbor.Model {
	t.Helper()
	m, err := harbor.Default(4)
	if err != nil {
		t.Fatal(err)
	}
	return m
}

func upkeep4(t *testing.T) *upkeep.Model {
	t.Helper()
	m, err := upkeep.Default(4)
	if err != nil {
		t.Fatal(err)
	}
	return m
}

// spread is episode seed's start state after a few random joint controls,
// so robots stand apart and control counts differ (upkeep).
func spread(m model.Model, seed uint64, steps int) model.State {
	x := m.NewState()
	episode.Start(m, seed, x)
	rng := model.NewRNG(model.Mix(seed, 99))
	u := make([]int, m.Robots())
	for s := 1; s <= steps; s++ {
		for r := range u {
			u[r] = rng.IntN(m.NumControls(x, r))
		}
		m.Step(x, u, rng.Rand)
	}
	return x
}

// fill runs s.Fill and checks the contract: entries outside missing are
// left as they were.
func fill(t *testing.T, s signal.Source, c *signal.Context, missing, out []int) {
	t.Helper()
	before := slices.Clone(out)
	s.Fill(c, missing, out)
	for j := range out {
		if !slices.Contains(missing, j) && out[j] != before[j] {
			t.Fatalf("%s changed robot %d (not missing): %d -> %d", s.Name(), j, before[j], out[j])
		}
	}
}

func neg(n int) []int {
	out := make([]int, n)
	for i := range out {
		out[i] = -1
	}
	return out
}

func TestNewAndNames(t *testing.T) {
	m := harbor4(t)
	if got := signal.Names(); !slices.Equal(got, []string{"base", "last", "recompute", "learned", "checked"}) {
		t.Fatalf("Names() = %v", got)
	}
	for _, name := range signal.Names() {
		s, err := signal.New(name, m, signal.Options{})
		if err != nil || s.Name() != name {
			t.Fatalf("New(%q) = %v, %v", name, s, err)
		}
	}
	if s, err := signal.New("", m, signal.Options{}); err != nil || s.Name() != "base" {
		t.Fatalf(`New("") = %v, %v; want base`, s, err)
	}
	_, err := signal.New("oracle", m, signal.Options{})
	if err == nil || !strings.Contains(err.Error(), `"oracle"`) || !strings.Contains(err.Error(), "recompute") {
		t.Fatalf("unknown name: %v", err)
	}
}

// ctx4 is robot 1 deciding third in order 3,0,1,2 with robot 3 heard.
func ctx4(x model.State) (*signal.Context, []int, []int) {
	c := &signal.Context{X: x, Round: 7, Order: []int{3, 0, 1, 2}, Robot: 1,
		Known: []int{-1, -1, -1, harbor.North}, Seed: 5, Decide: small}
	return c, []int{0}, slices.Clone(c.Known)
}

func TestBase(t *testing.T) {
	m := harbor4(t)
	x := spread(m, 3, 4)
	c := &signal.Context{X: x, Round: 2, Order: []int{2, 0, 3, 1}, Robot: 1, Known: []int{-1, -1, -1, harbor.West}}
	out := slices.Clone(c.Known)
	out[1] = 42 // the deciding robot's own slot must be left alone
	fill(t, signal.Base{M: m}, c, []int{2, 0}, out)
	want := []int{m.Base(x, 0), 42, m.Base(x, 2), harbor.West}
	if !slices.Equal(out, want) {
		t.Fatalf("base filled %v, want %v", out, want)
	}
}

func TestLast(t *testing.T) {
	m := harbor4(t)
	x := spread(m, 4, 3)
	c, _, out := ctx4(x)
	c.Order, c.Robot = []int{0, 2, 3, 1}, 1
	c.Last = []int{harbor.South, harbor.East, -1, harbor.Hold}
	fill(t, signal.Last{M: m}, c, []int{0, 2}, out)
	want := []int{harbor.South, -1, m.Base(x, 2), harbor.North}
	if !slices.Equal(out, want) {
		t.Fatalf("last filled %v, want %v (robot 2 held last round: base)", out, want)
	}
	// No previous round seen at all: base.
	c.Last = nil
	out = slices.Clone(c.Known)
	fill(t, signal.Last{M: m}, c, []int{0}, out)
	if out[0] != m.Base(x, 0) {
		t.Fatalf("without a last round: %d, want base %d", out[0], m.Base(x, 0))
	}
}

// A control is an index into the robot's current options: upkeep robots
// have deg(site)+1 of them, so last round's control can be out of range
// after a move; last then adapts to base.
func TestLastAdaptsInvalidControl(t *testing.T) {
	m := upkeep4(t)
	x := m.NewState()
	m.Start(x, nil)
	// Find a site with more roads than another.
	wide, narrow := 0, 0
	for s := range m.NumSites() {
		if len(m.Neighbours(s)) > len(m.Neighbours(wide)) {
			wide = s
		}
		if len(m.Neighbours(s)) < len(m.Neighbours(narrow)) {
			narrow = s
		}
	}
	if len(m.Neighbours(wide)) == len(m.Neighbours(narrow)) {
		t.Fatal("every site has the same degree; the test needs two that differ")
	}
	lastCtl := len(m.Neighbours(wide)) // the last road out of the wide site
	if err := m.Absorb(x, 0, int32(narrow), nil); err != nil {
		t.Fatal(err)
	}
	if lastCtl < m.NumControls(x, 0) {
		t.Fatalf("control %d should be invalid at the narrow site (%d controls)", lastCtl, m.NumControls(x, 0))
	}
	c := &signal.Context{X: x, Round: 2, Order: []int{0, 1}, Robot: 1, Known: neg(4), Last: []int{lastCtl, 0, 0, 0}}
	out := slices.Clone(c.Known)
	fill(t, signal.Last{M: m}, c, []int{0}, out)
	if out[0] != m.Base(x, 0) {
		t.Fatalf("invalid last control %d became %d, want base %d", lastCtl, out[0], m.Base(x, 0))
	}
	// Still valid where it is: kept.
	if err := m.Absorb(x, 0, int32(wide), nil); err != nil {
		t.Fatal(err)
	}
	out = slices.Clone(c.Known)
	fill(t, signal.Last{M: m}, c, []int{0}, out)
	if out[0] != lastCtl {
		t.Fatalf("valid last control %d became %d", lastCtl, out[0])
	}
}

// stubClassifier predicts (r+k) mod 5 and records what it was asked.
type stubClassifier struct{ asked [][2]int }

func (s *stubClassifier) Predict(_ model.State, r, k int) int {
	s.asked = append(s.asked, [2]int{r, k})
	if r == 3 {
		return 99 // not a control: must become base
	}
	return (r + k) % 5
}

func TestLearned(t *testing.T) {
	m := harbor4(t)
	x := spread(m, 5, 2)
	cl := &stubClassifier{}
	c := &signal.Context{X: x, Round: 3, Order: []int{2, 3, 0, 1}, Robot: 1, Known: neg(4)}
	out := slices.Clone(c.Known)
	fill(t, signal.Learned{M: m, C: cl}, c, []int{2, 3, 0}, out)
	if want := [][2]int{{2, 0}, {3, 1}, {0, 2}}; !slices.Equal(cl.asked, want) {
		t.Fatalf("asked %v, want (robot, turn position) %v", cl.asked, want)
	}
	if want := []int{2, -1, 2, m.Base(x, 3)}; !slices.Equal(out, want) {
		t.Fatalf("learned filled %v, want %v", out, want)
	}
	// No classifier loaded: base.
	l := signal.Learned{M: m}
	if l.Loaded() {
		t.Fatal("Loaded with no classifier")
	}
	out = slices.Clone(c.Known)
	fill(t, l, c, []int{2, 3, 0}, out)
	if want := []int{m.Base(x, 0), -1, m.Base(x, 2), m.Base(x, 3)}; !slices.Equal(out, want) {
		t.Fatalf("unloaded learned filled %v, want base %v", out, want)
	}
}

// Recompute reproduces one-at-a-time rollout exactly: a robot that hears
// none of its predecessors and recomputes them all gets the decisions the
// sequential fleet made, and so makes the same decision itself.
func TestRecomputeIsOneAtATime(t *testing.T) {
	for _, sc := range []struct {
		name string
		m    func(*testing.T) model.Model
	}{
		{"harbor", func(t *testing.T) model.Model { return harbor4(t) }},
		{"upkeep", func(t *testing.T) model.Model { return upkeep4(t) }},
	} {
		t.Run(sc.name, func(t *testing.T) {
			m := sc.m(t)
			R := m.Robots()
			seq := decide.New(m, small)
			own := decide.New(m, small)
			src, err := signal.New("recompute", m, signal.Options{})
			if err != nil {
				t.Fatal(err)
			}
			want := make([]int, R)
			rng := model.NewRNG(17)
			for ep := range 6 {
				seed := episode.Seed(11, ep)
				x := spread(m, seed, 1+ep)
				order := rng.Perm(R)
				fleetSeed := episode.FleetSeed(seed)
				for round := 1; round <= 3; round++ {
					seq.OneAtATime(x, order, fleetSeed, round, want)
					for k, r := range order {
						c := &signal.Context{X: x, Round: uint64(round), Order: order, Robot: r, Known: neg(R),
							Seed: fleetSeed, Decide: small}
						out := slices.Clone(c.Known)
						fill(t, src, c, order[:k], out)
						for _, p := range order[:k] {
							if out[p] != want[p] {
								t.Fatalf("ep %d round %d order %v: robot %d recomputed robot %d as %d, it decided %d",
									ep, round, order, r, p, out[p], want[p])
							}
						}
						for _, q := range order[k:] {
							if out[q] != -1 {
								t.Fatalf("robot %d's fill touched successor %d", r, q)
							}
						}
						if got, _ := own.Turn(x, r, out, decide.TurnSeed(fleetSeed, round, r)); got != want[r] {
							t.Fatalf("ep %d round %d: robot %d decided %d after recompute, sequential %d", ep, round, r, got, want[r])
						}
					}
				}
			}
		})
	}
}

// Heard predecessors are used as they are; only the missing are recomputed.
func TestRecomputeUsesHeard(t *testing.T) {
	m := harbor4(t)
	x := spread(m, 8, 2)
	order := []int{1, 3, 0, 2}
	want := make([]int, 4)
	decide.New(m, small).OneAtATime(x, order, 9, 4, want)
	known := neg(4)
	known[3] = want[3]
	c := &signal.Context{X: x, Round: 4, Order: order, Robot: 2, Known: known, Seed: 9, Decide: small}
	out := slices.Clone(known)
	fill(t, signal.NewRecompute(m, signal.Base{M: m}, 0), c, []int{1, 0}, out)
	if !slices.Equal(out[:2], want[:2]) || out[3] != want[3] || out[2] != -1 {
		t.Fatalf("got %v, want %v with robot 2 unset", out, want)
	}
}

// recorder is a fallback that says which robots it was asked for.
type recorder struct {
	got []int
}

func (*recorder) Name() string { return "recorder" }
func (r *recorder) Fill(_ *signal.Context, missing []int, out []int) {
	for _, j := range missing {
		r.got = append(r.got, j)
		out[j] = 100 + j
	}
}

func TestRecomputeBudgetFallback(t *testing.T) {
	m := harbor4(t)
	x := spread(m, 9, 3)
	order := []int{0, 1, 2, 3}
	want := make([]int, 4)
	decide.New(m, small).OneAtATime(x, order, 3, 2, want)
	for _, tc := range []struct {
		name      string
		budget    int // Expired turns true after this many checks
		max       int
		recompute int // predecessors expected recomputed
	}{
		{"expired at once", 0, 0, 0},
		{"expired after one", 1, 0, 1},
		{"cap of two", 99, 2, 2},
		{"unlimited", 99, 0, 3},
	} {
		t.Run(tc.name, func(t *testing.T) {
			fb := &recorder{}
			checks := 0
			c := &signal.Context{X: x, Round: 2, Order: order, Robot: 3, Known: neg(4), Seed: 3, Decide: small,
				Expired: func() bool { checks++; return checks > tc.budget }}
			out := slices.Clone(c.Known)
			fill(t, signal.NewRecompute(m, fb, tc.max), c, []int{0, 1, 2}, out)
			if !slices.Equal(out[:tc.recompute], want[:tc.recompute]) {
				t.Fatalf("recomputed %v, want %v", out[:tc.recompute], want[:tc.recompute])
			}
			if wantFB := []int{0, 1, 2}[tc.recompute:]; !slices.Equal(fb.got, wantFB) {
				t.Fatalf("fallback asked for %v, want %v", fb.got, wantFB)
			}
			for _, j := range fb.got {
				if out[j] != 100+j {
					t.Fatalf("fallback's guess for %d not kept: %v", j, out)
				}
			}
		})
	}
	// Default fallbacks: learned when a classifier is loaded, else base.
	expired := func() bool { return true }
	for _, tc := range []struct {
		opts signal.Options
		want func(j int) int
	}{
		{signal.Options{}, func(j int) int { return m.Base(x, j) }},
		{signal.Options{Classifier: &stubClassifier{}}, func(j int) int { return (j + j) % 5 }}, // k == j here
	} {
		src, _ := signal.New("recompute", m, tc.opts)
		c := &signal.Context{X: x, Round: 2, Order: order, Robot: 3, Known: neg(4), Seed: 3, Decide: small, Expired: expired}
		out := slices.Clone(c.Known)
		fill(t, src, c, []int{0, 1, 2}, out)
		for _, j := range []int{0, 1, 2} {
			if out[j] != tc.want(j) {
				t.Fatalf("classifier %v: fallback guess for %d = %d, want %d", tc.opts.Classifier != nil, j, out[j], tc.want(j))
			}
		}
	}
}

// A recompute turn reuses its Decider: no allocation per Fill.
func TestRecomputeNoAllocs(t *testing.T) {
	m := harbor4(t)
	x := spread(m, 2, 2)
	cfg := decide.Config{Samples: 2, Horizon: 3, Workers: 1}
	src := signal.NewRecompute(m, signal.Base{M: m}, 0)
	c := &signal.Context{X: x, Round: 1, Order: []int{0, 1, 2, 3}, Robot: 3, Known: neg(4), Decide: cfg}
	out, missing := make([]int, 4), []int{0, 1, 2}
	fill := func() { copy(out, c.Known); src.Fill(c, missing, out) }
	fill()
	if a := testing.AllocsPerRun(20, fill); a != 0 {
		t.Fatalf("%v allocations per Fill", a)
	}
}

func ExampleNew() {
	m, _ := harbor.Default(2)
	x := m.NewState()
	m.Start(x, model.NewRNG(1).Rand)
	src, _ := signal.New("last", m, signal.Options{})
	c := &signal.Context{X: x, Round: 2, Order: []int{0, 1}, Robot: 1, Known: []int{-1, -1}, Last: []int{harbor.North, -1}}
	out := slices.Clone(c.Known)
	src.Fill(c, []int{0}, out)
	fmt.Println(src.Name(), out)
	// Output: last [1 -1]
}

// sureClassifier guesses control 1 for every robot, sure of robot 0 only.
type sureClassifier struct{}

func (sureClassifier) Predict(x model.State, r, k int) int { return 1 }
func (sureClassifier) PredictConfident(_ model.State, r, _ int, _ []int) (int, float64) {
	if r == 0 {
		return 1, 0.95
	}
	return 1, 0.4
}

// checked keeps the sure guesses, recomputes the weak ones while there is
// time (exactly recompute's result: the one-at-a-time turn), uses the weak
// guess once out of time, and counts each path.
func TestChecked(t *testing.T) {
	m := harbor4(t)
	x := spread(m, 8, 2)
	order := []int{0, 1, 2, 3}
	ch := signal.NewChecked(m, sureClassifier{}, 0.8, 0)
	c := &signal.Context{X: x, Round: 4, Order: order, Robot: 3, Known: neg(4), Seed: 9, Decide: small}
	out := slices.Clone(c.Known)
	fill(t, ch, c, []int{0, 1, 2}, out)
	// Robot 0 is guessed 1 (sure); 1 and 2 recomputed given the guesses
	// before them, as recompute would given the same.
	rec := slices.Clone(c.Known)
	rec[0] = 1
	fill(t, signal.NewRecompute(m, signal.Base{M: m}, 0), c, []int{1, 2}, rec)
	if out[0] != 1 || out[1] != rec[1] || out[2] != rec[2] {
		t.Fatalf("got %v, want 1 then recompute's %v", out, rec)
	}
	if p := ch.Paths(); p.Confident != 1 || p.Recomputed != 2 || p.FellBack != 0 {
		t.Fatalf("%+v", p)
	}
	budget := 1
	c.Expired = func() bool { budget--; return budget < 0 }
	out = slices.Clone(c.Known)
	fill(t, ch, c, []int{0, 1, 2}, out)
	if out[2] != 1 {
		t.Fatalf("out of time, robot 2's weak guess 1 should stand: %v", out)
	}
	if p := ch.Paths(); p.Confident != 2 || p.Recomputed != 3 || p.FellBack != 1 {
		t.Fatalf("%+v", p)
	}
}
