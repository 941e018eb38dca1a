package harbor

import (
	"fmt"
	"maps"
	"slices"
	"testing"

	"baton/sim/fleetcheck"
	"baton/sim/model"
)

// fleetModels are the demo harbors and a spread of tiny ones (1-2 boats,
// small grids with edges everywhere, with and without drift).
func fleetModels(t *testing.T) map[string]*Model {
	t.Helper()
	ms := map[string]*Model{}
	for _, boats := range []int{1, 4, 6} {
		m, err := Default(boats)
		if err != nil {
			t.Fatal(err)
		}
		ms[fmt.Sprintf("demo/%d", boats)] = m
	}
	scatter := Defaults()
	scatter.Scatter, scatter.Drift, scatter.Current = true, 0.9, ""
	m, err := New(scatter)
	if err != nil {
		t.Fatal(err)
	}
	ms["scatter"] = m
	for seed := uint64(1); seed <= 12; seed++ {
		ms[fmt.Sprintf("tiny/%d", seed)] = RandomTiny(seed)
	}
	return ms
}

// The model.Fleet round trip (sim/fleetcheck), with the slicks left
// compared too; episodes finish, so terminal states round-trip as well.
func TestFleetRoundTrip(t *testing.T) {
	ms := fleetModels(t)
	for i, name := range slices.Sorted(maps.Keys(ms)) {
		st, err := fleetcheck.RoundTrip(ms[name], fleetcheck.Options{Seed: model.Mix(7, uint64(i)), Episodes: 30,
			Same: func(y, z model.State) error {
				if a, b := y.(*State).Left, z.(*State).Left; a != b {
					return fmt.Errorf("%d slicks left after Step, %d rebuilt", a, b)
				}
				return nil
			}})
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		t.Logf("%s: %d steps, %d on terminal states", name, st.Steps, st.Terminal)
		if st.Terminal == 0 {
			t.Errorf("%s: no terminal state reached in %d steps", name, st.Steps)
		}
	}
}

func TestSenseReportsEverySlickByIndex(t *testing.T) {
	m := tiny(t, "width: 4\nheight: 2\nrobots: 2\nstarts: [[0,0],[3,1]]\nslicks: 3\nslick_cells: [[1,0],[3,1],[2,1]]\n")
	s := m.NewState()
	m.Start(s, nil) // boat 1 starts on slick 1, which is collected at once
	want := []model.Sighting{{What: 0, Value: 1}, {What: 1, Value: -1}, {What: 2, Value: 6}}
	for r := range 2 {
		if got := m.Sense(s, r, nil); !slices.Equal(got, want) {
			t.Errorf("boat %d senses %v, want %v", r, got, want)
		}
	}
	// Sense appends.
	if got := m.Sense(s, 0, []model.Sighting{{What: 9, Value: 9}}); len(got) != 4 || got[0].What != 9 {
		t.Errorf("Sense should append to dst: %v", got)
	}
}

func TestAbsorbErrors(t *testing.T) {
	m := tiny(t, "width: 3\nheight: 2\nrobots: 2\nslicks: 3\nslick_cells: [[1,0],[2,1],[2,0]]\n")
	cases := []struct {
		name string
		r    int
		pos  int32
		seen []model.Sighting
		want string
	}{
		{"negative boat", -1, 0, nil, "report from boat -1: no such boat (2 boats)"},
		{"boat too high", 2, 0, nil, "report from boat 2: no such boat (2 boats)"},
		{"negative position", 0, -1, nil, "report from boat 0: position -1 is not a cell of the 3 x 2 grid"},
		{"position off the grid", 1, 6, nil, "report from boat 1: position 6 is not a cell of the 3 x 2 grid"},
		{"negative slick", 0, 1, []model.Sighting{{What: -1, Value: 0}}, "report from boat 0: sighting 0: slick -1 does not exist (3 slicks)"},
		{"slick too high", 0, 1, []model.Sighting{{What: 0, Value: 0}, {What: 3, Value: 0}}, "report from boat 0: sighting 1: slick 3 does not exist (3 slicks)"},
		{"slick below -1", 0, 1, []model.Sighting{{What: 2, Value: -2}}, "report from boat 0: sighting 0: slick 2 at -2, which is neither -1 (collected) nor a cell of the 3 x 2 grid"},
		{"slick off the grid", 0, 1, []model.Sighting{{What: 2, Value: 6}}, "report from boat 0: sighting 0: slick 2 at 6, which is neither -1 (collected) nor a cell of the 3 x 2 grid"},
		{"duplicate slick", 1, 1, []model.Sighting{{What: 1, Value: 0}, {What: 0, Value: 4}, {What: 1, Value: 0}}, "report from boat 1: sighting 2: slick 1 reported twice"},
	}
	s := m.NewState()
	m.Start(s, nil)
	before, _ := m.Flatten(s, nil, nil)
	left := s.(*State).Left
	for _, c := range cases {
		err := m.Absorb(s, c.r, c.pos, c.seen)
		if err == nil || err.Error() != c.want {
			t.Errorf("%s: err = %v\nwant %s", c.name, err, c.want)
		}
		if after, _ := m.Flatten(s, nil, nil); !slices.Equal(after, before) || s.(*State).Left != left {
			t.Errorf("%s: a rejected report changed the state: %v -> %v", c.name, before, after)
		}
	}
}

// A partial report updates only what it names; a slick reported at a cell
// after being collected is believed (the world is right), and Left follows.
func TestAbsorbPartialAndUncollect(t *testing.T) {
	m := tiny(t, "width: 3\nheight: 2\nrobots: 2\nslicks: 3\nslick_cells: [[1,0],[2,1],[2,0]]\n")
	s := m.NewState()
	m.Start(s, nil)
	st := s.(*State)
	if err := m.Absorb(s, 1, 4, []model.Sighting{{What: 0, Value: -1}, {What: 2, Value: 4}}); err != nil {
		t.Fatal(err)
	}
	// Slick 2 now sits under boat 1 uncollected: legal after a drift.
	if !slices.Equal(st.Boats, []int32{0, 4}) || !slices.Equal(st.Slicks, []int32{-1, 5, 4}) || st.Left != 2 {
		t.Fatalf("boats %v slicks %v left %d", st.Boats, st.Slicks, st.Left)
	}
	if err := m.Absorb(s, 0, 0, []model.Sighting{{What: 0, Value: 3}}); err != nil {
		t.Fatal(err)
	}
	if st.Slicks[0] != 3 || st.Left != 3 {
		t.Fatalf("uncollected slick: slicks %v left %d", st.Slicks, st.Left)
	}
	// A full report of collected slicks makes the state terminal.
	if err := m.Absorb(s, 0, 0, []model.Sighting{{What: 0, Value: -1}, {What: 1, Value: -1}, {What: 2, Value: -1}}); err != nil {
		t.Fatal(err)
	}
	if !m.Terminal(s) {
		t.Fatal("all slicks reported collected, state not terminal")
	}
}

func TestFlattenUnflatten(t *testing.T) {
	m, err := Default(4)
	if err != nil {
		t.Fatal(err)
	}
	rng := model.NewRNG(3)
	s, d := m.NewState(), m.NewState()
	m.Start(s, rng.Rand)
	u := make([]int, m.Robots())
	for range 15 {
		model.BaseJoint(m, s, u)
		m.Step(s, u, rng.Rand)
	}
	ints, reals := m.Flatten(s, []int32{42}, nil) // Flatten appends
	if len(ints) != 1+4+8 || ints[0] != 42 || len(reals) != 0 {
		t.Fatalf("Flatten: %d ints (first %d), %d reals", len(ints), ints[0], len(reals))
	}
	if err := m.Unflatten(d, ints[1:], reals); err != nil {
		t.Fatal(err)
	}
	if m.Key(d) != m.Key(s) || d.(*State).Left != s.(*State).Left || !slices.Equal(d.(*State).Slicks, s.(*State).Slicks) {
		t.Fatalf("round trip: %v, want %v", d, s)
	}
	if d.(*State).Left == 8 {
		t.Fatal("the test should cover collected slicks")
	}
}

func TestUnflattenErrors(t *testing.T) {
	m := tiny(t, "width: 3\nheight: 2\nrobots: 2\nslicks: 4\n")
	good := []int32{0, 5, 1, -1, 2, 3}
	cases := []struct {
		name  string
		ints  []int32
		reals []float64
		want  string
	}{
		{"too few ints", good[:3], nil, "snapshot: 3 ints, want 6 (2 boats + 4 slicks)"},
		{"too many ints", append(slices.Clone(good), 0), nil, "snapshot: 7 ints, want 6 (2 boats + 4 slicks)"},
		{"no ints", nil, nil, "snapshot: 0 ints, want 6 (2 boats + 4 slicks)"},
		{"reals", good, []float64{1}, "snapshot: 1 reals, want 0 (a harbor state has none)"},
		{"boat off the grid", []int32{0, 6, 1, -1, 2, 3}, nil, "snapshot: boat 1 at 6, not a cell of the 3 x 2 grid"},
		{"boat collected", []int32{-1, 5, 1, -1, 2, 3}, nil, "snapshot: boat 0 at -1, not a cell of the 3 x 2 grid"},
		{"slick off the grid", []int32{0, 5, 1, -1, 2, 6}, nil, "snapshot: slick 3 at 6, neither -1 (collected) nor a cell of the 3 x 2 grid"},
		{"slick below -1", []int32{0, 5, -7, -1, 2, 3}, nil, "snapshot: slick 0 at -7, neither -1 (collected) nor a cell of the 3 x 2 grid"},
	}
	d := m.NewState()
	if err := m.Unflatten(d, good, nil); err != nil {
		t.Fatal(err)
	}
	if d.(*State).Left != 3 {
		t.Fatalf("Left = %d, want 3 (it is derived from the slicks)", d.(*State).Left)
	}
	for _, c := range cases {
		err := m.Unflatten(d, c.ints, c.reals)
		if err == nil || err.Error() != c.want {
			t.Errorf("%s: err = %v\nwant %s", c.name, err, c.want)
		}
		if got, _ := m.Flatten(d, nil, nil); !slices.Equal(got, good) || d.(*State).Left != 3 {
			t.Errorf("%s: a rejected snapshot changed the state to %v", c.name, got)
		}
	}
}

// The coordinator's per-round work (Advance, Sense, Absorb, Flatten into
// reused buffers) allocates nothing either.
func TestFleetNoAllocs(t *testing.T) {
	m, _ := Default(6)
	rng := model.NewRNG(5)
	y, z := m.NewState(), m.NewState()
	m.Start(y, rng.Rand)
	u := make([]int, m.Robots())
	seen := make([]model.Sighting, 0, m.Config().Slicks)
	ints := make([]int32, 0, m.Robots()+m.Config().Slicks)
	allocs := testing.AllocsPerRun(200, func() {
		if m.Terminal(y) {
			m.Start(y, rng.Rand)
		}
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
		ints, _ = m.Flatten(z, ints[:0], nil)
	})
	if allocs != 0 {
		t.Fatalf("the fleet round trip allocates %.1f times per step", allocs)
	}
}
