package upkeep

import (
	"bytes"
	"fmt"
	"maps"
	"math"
	"slices"
	"testing"

	"baton/sim/fleetcheck"
	"baton/sim/model"
)

// withObserve re-reads m with the other observe mode, through Format, so
// the instance is otherwise the same.
func withObserve(t *testing.T, m *Model, mode string) *Model {
	t.Helper()
	src := m.Format()
	for _, old := range []string{"observe: own\n", "observe: all\n"} {
		src = bytes.Replace(src, []byte(old), []byte("observe: "+mode+"\n"), 1)
	}
	out, err := Parse("t.yaml", src, 0)
	if err != nil {
		t.Fatal(err)
	}
	if out.ObserveAll() != (mode == "all") {
		t.Fatalf("observe mode %q not applied", mode)
	}
	return out
}

// fleetModels is the demo park and tiny instances, each in both observe
// modes: own is where beliefs spread, all is where they stay point masses.
func fleetModels(t *testing.T) map[string]*Model {
	t.Helper()
	ms := map[string]*Model{}
	for _, robots := range []int{1, 4, 7} {
		m, err := Default(robots)
		if err != nil {
			t.Fatal(err)
		}
		ms[fmt.Sprintf("demo/%d/own", robots)] = m
		ms[fmt.Sprintf("demo/%d/all", robots)] = withObserve(t, m, "all")
	}
	for seed := range uint64(12) {
		m := RandomTiny(seed)
		ms[fmt.Sprintf("tiny/%d/all", seed)] = m
		ms[fmt.Sprintf("tiny/%d/own", seed)] = withObserve(t, m, "own")
	}
	return ms
}

func sameBits(a, b []float64) bool {
	return slices.EqualFunc(a, b, func(x, y float64) bool { return math.Float64bits(x) == math.Float64bits(y) })
}

// The model.Fleet round trip (sim/fleetcheck): beliefs rebuilt bit for
// bit; in "own" mode the check is only worth something if beliefs spread.
func TestFleetRoundTrip(t *testing.T) {
	ms := fleetModels(t)
	for i, name := range slices.Sorted(maps.Keys(ms)) {
		m := ms[name]
		spread := 0
		_, err := fleetcheck.RoundTrip(m, fleetcheck.Options{Seed: model.Mix(11, uint64(i)), Visit: func(y model.State) {
			for site := range m.NumSites() {
				if _, ok := pointLevel(m.Belief(y, site)); !ok {
					spread++
				}
			}
		}})
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		if !m.ObserveAll() && spread == 0 {
			t.Errorf("%s: no belief ever spread", name)
		}
		if m.ObserveAll() && spread != 0 {
			t.Errorf("%s: observe all left %d site-steps unobserved", name, spread)
		}
	}
}

func TestSense(t *testing.T) {
	own := mustParse(t, lines(
		"levels: 2",
		"level_cost: [0, 1, 5]",
		"wear: 0.5",
		"sites: [{name: a, level: 2}, {name: b, level: 1}, {name: c}]",
		"roads: [[a, b], [b, c]]",
		"start: [a, c]",
	), 0)
	s := start(own)
	if got := own.Sense(s, 0, nil); !slices.Equal(got, []model.Sighting{{What: 0, Value: 2}}) {
		t.Errorf("own: robot 0 senses %v, want site 0 at level 2", got)
	}
	if got := own.Sense(s, 1, []model.Sighting{{What: 7, Value: 7}}); !slices.Equal(got, []model.Sighting{{What: 7, Value: 7}, {What: 2, Value: 0}}) {
		t.Errorf("own: robot 1 senses %v, want site 2 at level 0 appended", got)
	}
	// A spread belief is not reported: a robot on it would have seen one
	// level, and the state cannot say which.
	own.SetBelief(s, 0, []float64{0.5, 0.25, 0.25})
	if got := own.Sense(s, 0, nil); len(got) != 0 {
		t.Errorf("own: a spread belief was reported as %v", got)
	}

	all := withObserve(t, own, "all")
	s = start(all)
	want := []model.Sighting{{What: 0, Value: 2}, {What: 1, Value: 1}, {What: 2, Value: 0}}
	for r := range 2 {
		if got := all.Sense(s, r, nil); !slices.Equal(got, want) {
			t.Errorf("all: robot %d senses %v, want %v", r, got, want)
		}
	}
}

func TestPointLevel(t *testing.T) {
	cases := []struct {
		b     []float64
		level int
		ok    bool
	}{
		{[]float64{1, 0, 0}, 0, true},
		{[]float64{0, 0, 1}, 2, true},
		{[]float64{0, 1, 1}, -1, false},
		{[]float64{0.5, 0.5, 0}, -1, false},
		{[]float64{1 - 1e-16, 1e-16, 0}, -1, false},
		{[]float64{0, 0, 0}, -1, false},
	}
	for _, c := range cases {
		if l, ok := pointLevel(c.b); l != c.level || ok != c.ok {
			t.Errorf("pointLevel(%v) = %d %v, want %d %v", c.b, l, ok, c.level, c.ok)
		}
	}
}

func TestAbsorbErrors(t *testing.T) {
	m := mustParse(t, lines(
		"levels: 2",
		"level_cost: [0, 1, 5]",
		"sites: [{name: a}, {name: b}, {name: c}]",
		"roads: [[a, b], [b, c]]",
		"robots: 2",
	), 0)
	cases := []struct {
		name string
		r    int
		pos  int32
		seen []model.Sighting
		want string
	}{
		{"negative robot", -1, 0, nil, "report from robot -1: no such robot (2 robots)"},
		{"robot too high", 2, 0, nil, "report from robot 2: no such robot (2 robots)"},
		{"negative position", 0, -1, nil, "report from robot 0: position -1 is not a site (3 sites)"},
		{"position too high", 1, 3, nil, "report from robot 1: position 3 is not a site (3 sites)"},
		{"negative site", 0, 1, []model.Sighting{{What: -1, Value: 0}}, "report from robot 0: sighting 0: site -1 does not exist (3 sites)"},
		{"site too high", 0, 1, []model.Sighting{{What: 1, Value: 0}, {What: 3, Value: 0}}, "report from robot 0: sighting 1: site 3 does not exist (3 sites)"},
		{"negative level", 0, 1, []model.Sighting{{What: 1, Value: -1}}, "report from robot 0: sighting 0: site 1 at level -1, want 0..2"},
		{"level too high", 0, 1, []model.Sighting{{What: 1, Value: 3}}, "report from robot 0: sighting 0: site 1 at level 3, want 0..2"},
		{"duplicate site", 1, 2, []model.Sighting{{What: 2, Value: 1}, {What: 0, Value: 0}, {What: 2, Value: 1}}, "report from robot 1: sighting 2: site 2 reported twice"},
	}
	s := start(m)
	// A spread belief, so that a wrongly applied Observe would show.
	m.SetBelief(s, 1, []float64{0.25, 0.5, 0.25})
	bi, br := m.Flatten(s, nil, nil)
	for _, c := range cases {
		err := m.Absorb(s, c.r, c.pos, c.seen)
		if err == nil || err.Error() != c.want {
			t.Errorf("%s: err = %v\nwant %s", c.name, err, c.want)
		}
		if ai, ar := m.Flatten(s, nil, nil); !slices.Equal(ai, bi) || !sameBits(ar, br) {
			t.Errorf("%s: a rejected report changed the state", c.name)
		}
	}
}

// A level the belief said was impossible is believed: the world is right.
func TestAbsorbImpossibleLevel(t *testing.T) {
	m := mustParse(t, lines(
		"levels: 2",
		"level_cost: [0, 1, 5]",
		"sites: [{name: a}, {name: b}]",
		"roads: [[a, b]]",
	), 1)
	s := start(m)
	// b is surely at level 0; a robot arrives and finds it failed.
	if err := m.Absorb(s, 0, 1, []model.Sighting{{What: 1, Value: 2}}); err != nil {
		t.Fatal(err)
	}
	if m.Position(s, 0) != 1 || !slices.Equal(m.Belief(s, 1), []float64{0, 0, 1}) || !slices.Equal(m.Belief(s, 0), []float64{1, 0, 0}) {
		t.Fatalf("position %d, beliefs %v %v", m.Position(s, 0), m.Belief(s, 0), m.Belief(s, 1))
	}
	// No sightings: only the position moves.
	if err := m.Absorb(s, 0, 0, nil); err != nil || m.Position(s, 0) != 0 || m.Belief(s, 1)[2] != 1 {
		t.Fatalf("empty report: err %v, position %d", err, m.Position(s, 0))
	}
}

func TestFlattenUnflatten(t *testing.T) {
	m, err := Default(4)
	if err != nil {
		t.Fatal(err)
	}
	rng := model.NewRNG(3)
	s, d := start(m), m.NewState()
	u := make([]int, m.Robots())
	for range 20 {
		model.BaseJoint(m, s, u)
		m.Step(s, u, rng.Rand)
	}
	ints, reals := m.Flatten(s, []int32{42}, []float64{0.5}) // Flatten appends
	if len(ints) != 1+4 || len(reals) != 1+m.NumSites()*(m.Levels()+1) || ints[0] != 42 || reals[0] != 0.5 {
		t.Fatalf("Flatten: %d ints, %d reals", len(ints), len(reals))
	}
	if err := m.Unflatten(d, ints[1:], reals[1:]); err != nil {
		t.Fatal(err)
	}
	di, dr := m.Flatten(d, nil, nil)
	if !slices.Equal(di, ints[1:]) || !sameBits(dr, reals[1:]) || m.Key(d) != m.Key(s) {
		t.Fatal("round trip changed the state")
	}
	spread := 0
	for site := range m.NumSites() {
		if _, ok := pointLevel(m.Belief(s, site)); !ok {
			spread++
		}
	}
	if spread == 0 {
		t.Fatal("the test should cover spread beliefs")
	}
}

func TestUnflattenErrors(t *testing.T) {
	m := mustParse(t, lines(
		"levels: 2",
		"level_cost: [0, 1, 5]",
		"sites: [{name: a}, {name: b}, {name: c}]",
		"roads: [[a, b], [b, c]]",
		"robots: 2",
	), 0)
	goodI := []int32{0, 2}
	goodR := []float64{1, 0, 0, 0.25, 0.5, 0.25, 0, 0, 1}
	with := func(i int, v float64) []float64 {
		r := slices.Clone(goodR)
		r[i] = v
		return r
	}
	cases := []struct {
		name  string
		ints  []int32
		reals []float64
		want  string
	}{
		{"too few ints", goodI[:1], goodR, "snapshot: 1 ints, want 2 (one site per robot)"},
		{"too many ints", []int32{0, 1, 2}, goodR, "snapshot: 3 ints, want 2 (one site per robot)"},
		{"too few reals", goodI, goodR[:8], "snapshot: 8 reals, want 9 (3 sites x 3 levels)"},
		{"no reals", goodI, nil, "snapshot: 0 reals, want 9 (3 sites x 3 levels)"},
		{"negative site", []int32{-1, 2}, goodR, "snapshot: robot 0 at site -1, want 0..2"},
		{"site too high", []int32{0, 3}, goodR, "snapshot: robot 1 at site 3, want 0..2"},
		{"NaN belief", goodI, with(4, math.NaN()), "snapshot: site 1 level 1 has belief NaN, want a finite probability >= 0"},
		{"infinite belief", goodI, with(8, math.Inf(1)), "snapshot: site 2 level 2 has belief +Inf, want a finite probability >= 0"},
		{"negative belief", []int32{0, 2}, []float64{1.5, -0.5, 0, 0.25, 0.5, 0.25, 0, 0, 1}, "snapshot: site 0 level 1 has belief -0.5, want a finite probability >= 0"},
		{"sum below 1", goodI, with(3, 0.2), "snapshot: site 1 beliefs sum to 0.95, want 1 (within 1e-09)"},
		{"sum above 1", goodI, with(0, 1+2e-9), "snapshot: site 0 beliefs sum to 1.000000002, want 1 (within 1e-09)"},
		{"all zero", goodI, []float64{1, 0, 0, 0, 0, 0, 0, 0, 1}, "snapshot: site 1 beliefs sum to 0, want 1 (within 1e-09)"},
	}
	d := m.NewState()
	// Within the tolerance is fine: that is what rounding leaves.
	if err := m.Unflatten(d, goodI, with(0, 1+5e-10)); err != nil {
		t.Fatal(err)
	}
	if err := m.Unflatten(d, goodI, goodR); err != nil {
		t.Fatal(err)
	}
	for _, c := range cases {
		err := m.Unflatten(d, c.ints, c.reals)
		if err == nil || err.Error() != c.want {
			t.Errorf("%s: err = %v\nwant %s", c.name, err, c.want)
		}
		if gi, gr := m.Flatten(d, nil, nil); !slices.Equal(gi, goodI) || !sameBits(gr, goodR) {
			t.Errorf("%s: a rejected snapshot changed the state to %v %v", c.name, gi, gr)
		}
	}
}

// The coordinator's per-round work (Advance, Sense, Absorb, Flatten into
// reused buffers) allocates nothing, like Step.
func TestFleetNoAllocations(t *testing.T) {
	for _, mode := range []string{"own", "all"} {
		m, err := Default(4)
		if err != nil {
			t.Fatal(err)
		}
		m = withObserve(t, m, mode)
		y, z := start(m), m.NewState()
		u := make([]int, m.Robots())
		rng := model.NewRNG(9)
		seen := make([]model.Sighting, 0, m.NumSites())
		ints := make([]int32, 0, m.Robots())
		reals := make([]float64, 0, m.NumSites()*(m.Levels()+1))
		allocs := testing.AllocsPerRun(500, func() {
			m.CopyState(z, y)
			model.BaseJoint(m, y, u)
			m.Step(y, u, rng.Rand)
			m.Advance(z, u)
			for r := range m.Robots() {
				seen = m.Sense(y, r, seen[:0])
				if m.Absorb(z, r, m.Position(y, r), seen) != nil {
					panic("absorb")
				}
			}
			ints, reals = m.Flatten(z, ints[:0], reals[:0])
		})
		if allocs != 0 {
			t.Errorf("observe %s: the fleet round trip allocates %g times per step", mode, allocs)
		}
	}
}
