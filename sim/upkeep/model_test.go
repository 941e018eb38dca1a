package upkeep

import (
	"fmt"
	"math"
	"math/rand/v2"
	"reflect"
	"slices"
	"strings"
	"testing"

	"baton/sim/model"
)

func mustParse(t testing.TB, src string, robots int) *Model {
	t.Helper()
	m, err := Parse("t.yaml", []byte(src), robots)
	if err != nil {
		t.Fatal(err)
	}
	return m
}

func start(m *Model) *State {
	s := m.NewState().(*State)
	m.Start(s, nil)
	return s
}

func near(a, b, tol float64) bool { return math.Abs(a-b) <= tol }

// Site b wears by a birth chain and is never visited, so its belief is the
// law of min(#up-steps, L): the number of up-steps in n steps is binomial,
// the closed form of n independent Bernoulli(p) trials.
func TestBeliefBirthChainClosedForm(t *testing.T) {
	m := mustParse(t, lines(
		"levels: 2",
		"level_cost: [0, 1, 5]",
		"sites: [{name: a, wear: 0}, {name: b, wear: 0.2}]",
		"roads: [[a, b]]",
	), 1)
	s := start(m)
	rng := rand.New(rand.NewPCG(1, 2))
	for range 3 {
		m.Step(s, []int{0}, rng) // the robot services a (a no-op) and stays
	}
	p := 0.2
	want := []float64{
		math.Pow(1-p, 3),
		3 * p * math.Pow(1-p, 2),
		1 - math.Pow(1-p, 3) - 3*p*math.Pow(1-p, 2),
	}
	got := m.Belief(s, 1)
	for l := range want {
		if !near(got[l], want[l], 1e-12) {
			t.Errorf("P(level %d after 3 steps) = %.15g, want %.15g", l, got[l], want[l])
		}
	}
	if !reflect.DeepEqual(m.Belief(s, 0), []float64{1, 0, 0}) {
		t.Errorf("observed site a: belief %v, want a point mass at 0", m.Belief(s, 0))
	}
}

// A two-state chain [[1-a, a], [b, 1-b]] started at 0 has
// P(0 after n) = b/(a+b) + a/(a+b) (1-a-b)^n: the spectral closed form of a
// 2x2 stochastic matrix (eigenvalues 1 and 1-a-b).
func TestBeliefTwoStateChainClosedForm(t *testing.T) {
	m := mustParse(t, lines(
		"levels: 1",
		"level_cost: [0, 1]",
		"sites: [{name: a}, {name: b, chain: [[0.9, 0.1], [0.3, 0.7]]}]",
		"roads: [[a, b]]",
	), 1)
	s := start(m)
	rng := rand.New(rand.NewPCG(1, 2))
	for range 3 {
		m.Step(s, []int{0}, rng)
	}
	a, b := 0.1, 0.3
	want := b/(a+b) + a/(a+b)*math.Pow(1-a-b, 3) // 0.804
	if got := m.Belief(s, 1)[0]; !near(got, want, 1e-12) || !near(want, 0.804, 1e-12) {
		t.Errorf("P(level 0 after 3 steps) = %.15g, want %.15g", got, want)
	}
}

// The order of events: service, cost, wear, move, observe.
func TestStepOrderOfEvents(t *testing.T) {
	m := mustParse(t, lines(
		"levels: 2",
		"level_cost: [0, 1, 5]",
		"wear: 0.5",
		"sites: [{name: a, level: 2}, {name: b, level: 1}, {name: c, level: 2}]",
		"roads: [[a, b], [b, c]]",
		"start: [a, b]",
	), 0)
	s := start(m)
	rng := rand.New(rand.NewPCG(3, 4))
	// Robot 0 services a (level 2), robot 1 moves b -> c. The cost counts a
	// at 0 already, b at 1 and c at 2, before any wear: 0 + 1 + 5.
	if got := m.Step(s, []int{0, 2}, rng); got != 6 {
		t.Errorf("stage cost = %g, want 6", got)
	}
	if m.Position(s, 0) != 0 || m.Position(s, 1) != 2 {
		t.Errorf("positions %v, want [0 2]", m.Positions(s))
	}
	// a was serviced, then wore (0.5 up), then was observed: a point mass at 0 or 1.
	if b := m.Belief(s, 0); !(reflect.DeepEqual(b, []float64{1, 0, 0}) || reflect.DeepEqual(b, []float64{0, 1, 0})) {
		t.Errorf("a: %v, want a point mass at 0 or 1", b)
	}
	// b was left unobserved: level 1 wore into {1: 0.5, 2: 0.5}.
	if b := m.Belief(s, 1); !reflect.DeepEqual(b, []float64{0, 0.5, 0.5}) {
		t.Errorf("b: %v, want [0 0.5 0.5]", b)
	}
	// c is absorbed at 2 and now observed.
	if b := m.Belief(s, 2); !reflect.DeepEqual(b, []float64{0, 0, 1}) {
		t.Errorf("c: %v, want [0 0 1]", b)
	}
	if m.Observed(s, 1) || !m.Observed(s, 2) {
		t.Error("Observed should follow the robots")
	}
	m.Observe(s, 1, 2)
	if b := m.Belief(s, 1); !reflect.DeepEqual(b, []float64{0, 0, 1}) {
		t.Errorf("Observe: %v", b)
	}
	if got, want := m.TerminalCost(s), m.ExpectedCost(s)/(1-m.Discount()); got != want {
		t.Errorf("TerminalCost = %g, want %g", got, want)
	}
	if m.ControlName(s, 1, 0) != "service" || m.ControlName(s, 1, 1) != "to b" {
		t.Errorf("control names: %q %q", m.ControlName(s, 1, 0), m.ControlName(s, 1, 1))
	}
}

// Common random numbers: one uniform per site per step whatever the
// controls, so the stream stays in step and unobserved-site outcomes agree.
func TestStepDrawsOneUniformPerSite(t *testing.T) {
	m, err := Default(4)
	if err != nil {
		t.Fatal(err)
	}
	controls := [][]int{{0, 0, 0, 0}, {1, 2, 3, 0}, {3, 3, 1, 2}}
	var after []float64
	for _, u := range controls {
		s := start(m)
		rng := rand.New(rand.NewPCG(5, 6))
		for range 5 {
			m.Step(s, u, rng)
			for r := range u {
				u[r] = min(u[r], m.NumControls(s, r)-1)
			}
		}
		after = append(after, rng.Float64())
	}
	if after[0] != after[1] || after[1] != after[2] {
		t.Errorf("rng streams diverged with the controls: %v", after)
	}
}

// outcomeCheck compares Outcomes with Step's empirical frequencies from s.
func outcomeCheck(t *testing.T, m *Model, s *State, u []int, rng *rand.Rand, trials int) {
	t.Helper()
	probs := map[string]float64{}
	total := 0.0
	wantCost := math.NaN()
	m.Outcomes(s, u, func(next model.State, p, cost float64) {
		probs[m.Key(next)] += p
		total += p
		wantCost = cost
	})
	if !near(total, 1, 1e-12) {
		t.Fatalf("Outcomes probabilities sum to %.15g", total)
	}
	counts := map[string]int{}
	x := m.NewState()
	for range trials {
		m.CopyState(x, s)
		if c := m.Step(x, u, rng); c != wantCost {
			t.Fatalf("Step cost %g, Outcomes cost %g", c, wantCost)
		}
		k := m.Key(x)
		if _, ok := probs[k]; !ok {
			t.Fatalf("Step reached a state Outcomes does not list")
		}
		counts[k]++
	}
	// Each frequency is binomial with standard error sqrt(p(1-p)/N); 4.5
	// standard errors (plus one count for tiny p) fail a correct model with
	// probability below 1e-5 per outcome, and the seeds are fixed anyway.
	for k, p := range probs {
		f := float64(counts[k]) / float64(trials)
		tol := 4.5*math.Sqrt(p*(1-p)/float64(trials)) + 1/float64(trials)
		if math.Abs(f-p) > tol {
			t.Errorf("outcome with p=%.4f seen with frequency %.4f (tolerance %.4f)", p, f, tol)
		}
	}
}

func TestOutcomesMatchStep(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 8))
	const trials = 20000
	// Fully observed tiny instances from their start and after a few steps.
	for seed := range uint64(6) {
		m := RandomTiny(seed)
		s := start(m)
		u := make([]int, m.Robots())
		for step := range 3 {
			for r := range u {
				u[r] = (int(seed) + step + r) % m.NumControls(s, r)
			}
			outcomeCheck(t, m, s, u, rng, trials)
			m.Step(s, u, rng)
		}
	}
	// Own-site observation with spread beliefs: two robots wait at a while b
	// and c wear unseen, then both move out and see what they find.
	m := mustParse(t, lines(
		"levels: 2",
		"level_cost: [0, 1, 5]",
		"sites: [{name: a}, {name: b, wear: 0.3}, {name: c, wear: 0.2}]",
		"roads: [[a, b], [a, c]]",
		"robots: 2",
	), 0)
	s := start(m)
	for range 3 {
		m.Step(s, []int{0, 0}, rng)
	}
	if b := m.Belief(s, 1); b[0] == 1 || b[2] == 0 {
		t.Fatalf("b's belief did not spread: %v", b)
	}
	outcomeCheck(t, m, s, []int{1, 2}, rng, trials)
	outcomeCheck(t, m, s, []int{1, 1}, rng, trials)
}

// The base-policy graph: a square a-b-d-c with a tail d-e. Roads are listed
// so that c comes before b, to check neighbours are ordered by index, not
// by file order. Sorted neighbours: a [b c], d [b c e].
func baseGraph(t *testing.T, levels string, robots int) *Model {
	src := lines(
		levels,
		"threshold_level: 2",
		"threshold_prob: 0.3",
		"sites: [{name: a}, {name: b}, {name: c}, {name: d}, {name: e}]",
		"roads: [[a, c], [c, d], [d, e], [a, b], [b, d]]",
	)
	return mustParse(t, src, robots)
}

func TestBasePolicy(t *testing.T) {
	const (
		a, b, c, d, e = 0, 1, 2, 3, 4
	)
	m := baseGraph(t, "levels: 2\nlevel_cost: [0, 1, 5]", 3)
	cases := []struct {
		name string
		at   int
		bel  map[int][]float64
		want int
	}{
		{"nothing qualifies: stay", a, nil, 0},
		{"own site known worn: service", a, map[int][]float64{a: {0, 1, 0}, e: {0, 0, 1}}, 0},
		{"own site possibly bad: target at distance 0", a, map[int][]float64{a: {0.5, 0, 0.5}}, 0},
		{"next-hop tie: lowest-index neighbour", a, map[int][]float64{d: {0.5, 0, 0.5}}, 1},                        // via b, not c
		{"next-hop tie from d", d, map[int][]float64{a: {0, 0, 1}}, 1},                                             // via b
		{"nearest beats more likely", a, map[int][]float64{b: {0.6, 0, 0.4}, e: {0, 0, 1}}, 1},                     // b at 1 hop
		{"distance tie: more likely wins", a, map[int][]float64{b: {0.6, 0, 0.4}, c: {0.4, 0, 0.6}}, 2},            // c
		{"distance and probability tie: lower index", d, map[int][]float64{b: {0.5, 0, 0.5}, c: {0.5, 0, 0.5}}, 1}, // b
		{"exactly at the threshold does not qualify", a, map[int][]float64{b: {0.7, 0, 0.3}}, 0},
		{"level 1 does not count toward T=2", a, map[int][]float64{b: {0, 1, 0}}, 0},
		{"far target, one hop along", e, map[int][]float64{a: {0, 0, 1}}, 1}, // e's only neighbour is d
	}
	for _, tc := range cases {
		s := start(m)
		for site, v := range tc.bel {
			m.SetBelief(s, site, v)
		}
		for r := range m.Robots() {
			s.pos[r] = tc.at
		}
		for r := range m.Robots() {
			if got := m.Base(s, r); got != tc.want {
				t.Errorf("%s: robot %d control %d (%s), want %d", tc.name, r, got, m.ControlName(s, r, got), tc.want)
			}
		}
	}

	// P(level >= T) sums every level from T up.
	m3 := baseGraph(t, "levels: 3\nlevel_cost: [0, 1, 5, 9]", 1)
	s := start(m3)
	m3.SetBelief(s, c, []float64{0.4, 0.2, 0.2, 0.2}) // 0.4 > 0.3, though no single level is
	if got := m3.Base(s, 0); got != 2 {
		t.Errorf("summed tail: control %d, want 2 (to c)", got)
	}

	// Robots on different sites choose their own nearest target; the two
	// co-located ones herd to the same one.
	s = start(m)
	m.SetBelief(s, b, []float64{0.5, 0, 0.5})
	m.SetBelief(s, e, []float64{0.5, 0, 0.5})
	s.pos[0], s.pos[1], s.pos[2] = a, a, d
	if got := []int{m.Base(s, 0), m.Base(s, 1), m.Base(s, 2)}; !reflect.DeepEqual(got, []int{1, 1, 1}) {
		// a -> b is control 1; d's targets b and e tie at 1 hop and 0.5, so
		// b (lower index) is control 1 as well.
		t.Errorf("controls %v, want [1 1 1]", got)
	}
	m.SetBelief(s, e, []float64{0.4, 0, 0.6})
	if got := m.Base(s, 2); got != 3 {
		t.Errorf("robot at d: control %d, want 3 (to e, more likely)", got)
	}

	// At the start state the configured levels are the belief.
	ms := mustParse(t, lines(
		"levels: 2", "level_cost: [0, 1, 5]",
		"sites: [{name: a, level: 1}, {name: b}]", "roads: [[a, b]]", "robots: 2",
	), 0)
	if s := start(ms); ms.Base(s, 0) != 0 || ms.Base(s, 1) != 0 {
		t.Error("a robot starting on a worn site should service it")
	}
}

func TestNoAllocations(t *testing.T) {
	m, err := Default(4)
	if err != nil {
		t.Fatal(err)
	}
	s, x := m.NewState(), m.NewState()
	m.Start(s, nil)
	u := make([]int, m.Robots())
	rng := model.NewRNG(9)
	allocs := testing.AllocsPerRun(2000, func() {
		model.BaseJoint(m, s, u)
		m.Step(s, u, rng.Rand)
		_ = m.NumControls(s, 0)
		m.CopyState(x, s)
	})
	if allocs != 0 {
		t.Errorf("Step+Base+NumControls+CopyState allocate %g times per run", allocs)
	}
}

// The base policy on the demo actually services things: over an episode it
// beats standing still at the depot by a clear margin.
func TestBaseBeatsIdle(t *testing.T) {
	m, err := Default(4)
	if err != nil {
		t.Fatal(err)
	}
	run := func(base bool) float64 {
		total := 0.0
		for ep := range uint64(20) {
			rng := model.NewRNG(ep)
			s := start(m)
			u := make([]int, m.Robots())
			disc := 1.0
			for range m.Horizon() {
				if base {
					model.BaseJoint(m, s, u)
				}
				total += disc * m.Step(s, u, rng.Rand)
				disc *= m.Discount()
			}
		}
		return total / 20
	}
	idle, base := run(false), run(true)
	if !(base < 0.8*idle) {
		t.Errorf("base %.1f vs idle %.1f: base policy should clearly beat idling", base, idle)
	}
	t.Logf("discounted cost over %d steps: base %.1f, idle %.1f", m.Horizon(), base, idle)
}

func TestRandomTiny(t *testing.T) {
	sizes := map[int]bool{}
	for seed := range uint64(300) {
		m := RandomTiny(seed)
		if !reflect.DeepEqual(m, RandomTiny(seed)) {
			t.Fatalf("seed %d: not deterministic", seed)
		}
		n, L, r, a := m.NumSites(), m.Levels(), m.Robots(), m.Discount()
		if n < 2 || n > 4 || L < 1 || L > 2 || r < 1 || r > 2 || a < 0.8 || a > 0.95 || !m.ObserveAll() {
			t.Fatalf("seed %d: sites %d levels %d robots %d discount %g all %v", seed, n, L, r, a, m.ObserveAll())
		}
		if seed < 40 {
			states := reachable(t, m)
			sizes[states] = true
			if states > 1500 {
				t.Errorf("seed %d: %d reachable states", seed, states)
			}
		}
	}
	if len(sizes) < 5 {
		t.Errorf("only %d distinct state-space sizes over 40 seeds: not very random", len(sizes))
	}
}

// reachable explores every joint control from the start state.
func reachable(t *testing.T, m *Model) int {
	seen := map[string]bool{}
	var queue []model.State
	push := func(s model.State) {
		k := m.Key(s)
		if !seen[k] {
			seen[k] = true
			c := m.NewState()
			m.CopyState(c, s)
			queue = append(queue, c)
		}
	}
	push(start(m))
	u := make([]int, m.Robots())
	for len(queue) > 0 {
		s := queue[0]
		queue = queue[1:]
		var joint func(r int)
		joint = func(r int) {
			if r == len(u) {
				total := 0.0
				m.Outcomes(s, u, func(next model.State, p, _ float64) {
					total += p
					push(next)
				})
				if !near(total, 1, 1e-12) {
					t.Fatalf("probabilities sum to %.15g", total)
				}
				return
			}
			for c := range m.NumControls(s, r) {
				u[r] = c
				joint(r + 1)
			}
		}
		joint(0)
	}
	return len(seen)
}

func TestKey(t *testing.T) {
	m := RandomTiny(3)
	s1, s2 := start(m), start(m)
	if m.Key(s1) != m.Key(s2) {
		t.Error("equal states, different keys")
	}
	s2.pos[0] = (s2.pos[0] + 1) % m.NumSites()
	if m.Key(s1) == m.Key(s2) {
		t.Error("different positions, same key")
	}
	m.CopyState(s2, s1)
	m.Observe(s2, 0, (m.startLevel[0]+1)%(m.Levels()+1))
	if m.Key(s1) == m.Key(s2) {
		t.Error("different beliefs, same key")
	}
}

// The belief tables change no bit: the demo park stepped 400 times (past
// the tables' last age, so sites fall back to propagation too) gives the
// same costs and the same flattened states as the same model without
// tables, and a snapshot taken midway rejoins the tables on Unflatten and
// then steps the same.
func TestTablesChangeNoBit(t *testing.T) {
	m, err := Default(4)
	if err != nil {
		t.Fatal(err)
	}
	if m.ages == 0 {
		t.Fatal("the demo park has no belief tables")
	}
	plain := *m.WithoutTables()
	s, p := m.NewState(), plain.NewState()
	m.Start(s, nil)
	plain.Start(p, nil)
	r1, r2 := model.NewRNG(9), model.NewRNG(9)
	u := make([]int, m.Robots())
	tabled, fallen := 0, 0
	for step := range 400 {
		for r := range u {
			// Mostly the base policy, now and then a seeded other control.
			u[r] = m.Base(s, r)
			if step%7 == r {
				u[r] = step % m.NumControls(s, r)
			}
		}
		c1, c2 := m.Step(s, u, r1.Rand), plain.Step(p, u, r2.Rand)
		if math.Float64bits(c1) != math.Float64bits(c2) {
			t.Fatalf("step %d: cost %v with tables, %v without", step, c1, c2)
		}
		i1, f1 := m.Flatten(s, nil, nil)
		i2, f2 := plain.Flatten(p, nil, nil)
		if !slices.Equal(i1, i2) || !sameBits(f1, f2) {
			t.Fatalf("step %d: states differ", step)
		}
		for r := range u {
			if m.Base(s, r) != plain.Base(p, r) {
				t.Fatalf("step %d: robot %d's base control differs", step, r)
			}
		}
		for _, ti := range s.(*State).ti {
			if ti >= 0 {
				tabled++
			} else {
				fallen++
			}
		}
		if step == 60 {
			// The snapshot rejoins the tables and then steps as the
			// table-less model does from the same state.
			re := m.NewState().(*State)
			if err := m.Unflatten(re, i1, f1); err != nil {
				t.Fatal(err)
			}
			if !slices.ContainsFunc(re.ti, func(i int32) bool { return i >= 0 }) {
				t.Fatal("a snapshot did not rejoin the tables")
			}
			q := plain.NewState()
			plain.CopyState(q, p)
			ra, rb := model.NewRNG(77), model.NewRNG(77)
			for range 150 {
				model.BaseJoint(m, re, u)
				ca, cb := m.Step(re, u, ra.Rand), plain.Step(q, u, rb.Rand)
				ia, fa := m.Flatten(re, nil, nil)
				ib, fb := plain.Flatten(q, nil, nil)
				if math.Float64bits(ca) != math.Float64bits(cb) || !slices.Equal(ia, ib) || !sameBits(fa, fb) {
					t.Fatal("a state rebuilt from its snapshot steps differently")
				}
			}
		}
	}
	// Base reads a tabled site's tail probability from tabQ: it must be the
	// sum Base would make of the row.
	for i := range m.tabQ {
		if q := m.tailProb(m.tab[i*m.k : i*m.k+m.k]); math.Float64bits(q) != math.Float64bits(m.tabQ[i]) {
			t.Fatalf("row %d: tabled tail %v, summed %v", i, m.tabQ[i], q)
		}
	}
	if tabled == 0 || fallen == 0 {
		t.Fatalf("%d tabled and %d propagated site-steps: want both paths used", tabled, fallen)
	}
}

// BaseAll, the due sites found once for the fleet, gives every robot
// Base's control: the demo park stepped 300 times with seeded controls
// (sites fall due and get serviced), and a 40-site ring whose sites are all
// due (more than BaseAll lists at once), every robot anywhere.
func TestBaseAllIsBase(t *testing.T) {
	m, err := Default(4)
	if err != nil {
		t.Fatal(err)
	}
	check := func(m *Model, s model.State, what string) {
		t.Helper()
		u := make([]int, m.Robots())
		m.BaseAll(s, u)
		for r := range u {
			if b := m.Base(s, r); u[r] != b {
				t.Fatalf("%s: robot %d: BaseAll %d, Base %d", what, r, u[r], b)
			}
		}
	}
	s := m.NewState()
	m.Start(s, nil)
	rng := model.NewRNG(8)
	u := make([]int, m.Robots())
	due := 0
	for step := range 300 {
		check(m, s, fmt.Sprintf("park step %d", step))
		var want []int
		for site := range m.NumSites() {
			if m.Due(s, site) {
				want = append(want, site)
			}
		}
		if got := m.DueSites(s, nil); !slices.Equal(got, want) {
			t.Fatalf("park step %d: DueSites %v, Due says %v", step, got, want)
		}
		due += len(want)
		for r := range u {
			u[r] = rng.IntN(m.NumControls(s, r))
		}
		m.Step(s, u, rng.Rand)
	}
	if due == 0 {
		t.Fatal("no site ever fell due")
	}
	var sites, roads []string
	for i := range 40 {
		sites = append(sites, fmt.Sprintf("{name: s%d}", i))
		roads = append(roads, fmt.Sprintf("[s%d, s%d]", i, (i+1)%40))
	}
	ring := mustParse(t, lines("levels: 2", "level_cost: [0, 1, 5]", "threshold_level: 2", "threshold_prob: 0.3",
		"sites: ["+strings.Join(sites, ", ")+"]", "roads: ["+strings.Join(roads, ", ")+"]"), 3)
	rs := ring.NewState()
	ring.Start(rs, nil)
	for site := range 40 {
		ring.SetBelief(rs, site, []float64{0.5, 0, 0.5})
	}
	for at := range 40 {
		for r := range 3 {
			rs.(*State).pos[r] = (at + 13*r) % 40
		}
		check(ring, rs, fmt.Sprintf("ring, robots from site %d", at))
	}
}
