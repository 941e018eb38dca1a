package delivery

import (
	"fmt"
	"maps"
	"slices"
	"testing"

	"baton/sim/fleetcheck"
	"baton/sim/model"
)

// fleetModels are the depot with several fleet sizes and a spread of tiny
// random instances (full slots, terminal ones, robots sharing stations).
func fleetModels(t *testing.T) map[string]*Model {
	t.Helper()
	ms := map[string]*Model{}
	for _, robots := range []int{1, 3, 6} {
		ms[fmt.Sprintf("depot/%d", robots)] = mustDefault(t, robots)
	}
	for seed := uint64(1); seed <= 16; seed++ {
		ms[fmt.Sprintf("tiny/%d", seed)] = randomTiny(seed)
	}
	return ms
}

// The model.Fleet round trip (sim/fleetcheck), invalid controls included
// (they stay), with the carried parcels and destinations compared too.
func TestFleetRoundTrip(t *testing.T) {
	ms := fleetModels(t)
	terminalSomewhere := 0
	for i, name := range slices.Sorted(maps.Keys(ms)) {
		full, carried := 0, 0
		st, err := fleetcheck.RoundTrip(ms[name], fleetcheck.Options{Seed: model.Mix(7, uint64(i)), Episodes: 20, Invalid: true,
			Same: func(y, z model.State) error {
				ys, zs := y.(*State), z.(*State)
				if !slices.Equal(ys.Carry, zs.Carry) || !slices.Equal(ys.To, zs.To) {
					return fmt.Errorf("after Step carry %v to %v, rebuilt carry %v to %v", ys.Carry, ys.To, zs.Carry, zs.To)
				}
				return nil
			},
			Visit: func(y model.State) {
				ys := y.(*State)
				if !slices.Contains(ys.At, -1) {
					full++
				}
				for _, c := range ys.Carry {
					if c >= 0 {
						carried++
					}
				}
			}})
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		t.Logf("%s: %d steps, %d terminal, %d with every slot taken, %d robot-steps loaded", name, st.Steps, st.Terminal, full, carried)
		if carried == 0 {
			t.Errorf("%s: no robot ever carried a parcel", name)
		}
		terminalSomewhere += st.Terminal
	}
	if terminalSomewhere == 0 {
		t.Error("no instance reached a terminal state: the check misses them")
	}
}

func TestSenseReportsEverySlot(t *testing.T) {
	m := parse(t, line(3, "robots: 2\nstart: [s0, s2]\ncapacity: 3\nparcels: [{at: s1, to: s2}, {at: s2, to: s0}]\n"))
	s := start(m) // robot 1 starts on the parcel for s0 and takes it
	n := int32(m.n)
	want := []model.Sighting{{What: 0, Value: 1*n + 2}, {What: 1, Value: (n+1)*n + 0}, {What: 2, Value: -1}}
	for r := range 2 {
		if got := m.Sense(s, r, nil); !slices.Equal(got, want) {
			t.Errorf("robot %d senses %v, want %v", r, got, want)
		}
	}
	if got := m.Sense(s, 0, []model.Sighting{{What: 9, Value: 9}}); len(got) != 4 || got[0].What != 9 {
		t.Errorf("Sense should append to dst: %v", got)
	}
}

func TestAbsorbErrors(t *testing.T) {
	// 3 stations, 2 robots, 3 slots: codes are at*3+to, at < 3+2.
	m := parse(t, line(3, "robots: 2\nstart: [s0, s2]\ncapacity: 3\nparcels: [{at: s1, to: s2}]\n"))
	cases := []struct {
		name string
		r    int
		pos  int32
		seen []model.Sighting
		want string
	}{
		{"negative robot", -1, 0, nil, "report from robot -1: no such robot (2 robots)"},
		{"robot too high", 2, 0, nil, "report from robot 2: no such robot (2 robots)"},
		{"negative position", 0, -1, nil, "report from robot 0: position -1 is not a station (3 stations)"},
		{"position off the map", 1, 3, nil, "report from robot 1: position 3 is not a station (3 stations)"},
		{"negative slot", 0, 1, []model.Sighting{{What: -1, Value: -1}}, "report from robot 0: sighting 0: slot -1 does not exist (3 slots)"},
		{"slot too high", 0, 1, []model.Sighting{{What: 0, Value: -1}, {What: 3, Value: -1}}, "report from robot 0: sighting 1: slot 3 does not exist (3 slots)"},
		{"code below -1", 0, 1, []model.Sighting{{What: 2, Value: -2}}, "report from robot 0: sighting 0: slot 2: code -2 is neither -1 (empty) nor a parcel (0..14)"},
		{"code too high", 0, 1, []model.Sighting{{What: 2, Value: 15}}, "report from robot 0: sighting 0: slot 2: code 15 is neither -1 (empty) nor a parcel (0..14)"},
		{"waiting at its destination", 0, 1, []model.Sighting{{What: 2, Value: 4}}, "report from robot 0: sighting 0: slot 2: code 4: a parcel waiting at its own destination s1"},
		{"slot twice", 1, 1, []model.Sighting{{What: 1, Value: -1}, {What: 0, Value: 5}, {What: 1, Value: 2}}, "report from robot 1: sighting 2: slot 1 reported twice"},
		{"two parcels on one robot", 0, 1, []model.Sighting{{What: 1, Value: 3*3 + 0}, {What: 2, Value: 3*3 + 1}}, "report from robot 0: robot 0 carries two parcels (slots 1 and 2); a robot carries one"},
	}
	s := start(m)
	// A robot already carrying: a report giving it a second parcel elsewhere
	// is refused too (the merged state is checked).
	if err := m.Absorb(s, 1, 2, []model.Sighting{{What: 1, Value: 4*3 + 0}}); err != nil {
		t.Fatal(err)
	}
	cases = append(cases, struct {
		name string
		r    int
		pos  int32
		seen []model.Sighting
		want string
	}{"second parcel after merging", 0, 1, []model.Sighting{{What: 2, Value: 4*3 + 1}}, "report from robot 0: robot 1 carries two parcels (slots 1 and 2); a robot carries one"})
	before, _ := m.Flatten(s, nil, nil)
	carry := slices.Clone(s.Carry)
	for _, c := range cases {
		err := m.Absorb(s, c.r, c.pos, c.seen)
		if err == nil || err.Error() != c.want {
			t.Errorf("%s: err = %v\nwant %s", c.name, err, c.want)
		}
		if after, _ := m.Flatten(s, nil, nil); !slices.Equal(after, before) || !slices.Equal(s.Carry, carry) {
			t.Errorf("%s: a rejected report changed the state: %v -> %v", c.name, before, after)
		}
	}
}

// A partial report updates only what it names; Carry follows the slots.
func TestAbsorbPartial(t *testing.T) {
	m := parse(t, line(3, "robots: 2\nstart: [s0, s2]\ncapacity: 3\nparcels: [{at: s1, to: s2}]\n"))
	st := start(m)
	// Robot 0 reports itself at s1 with slot 0 on board; slot 2 appeared at s2.
	if err := m.Absorb(st, 0, 1, []model.Sighting{{What: 0, Value: 3*3 + 2}, {What: 2, Value: 2*3 + 0}}); err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(st.Pos, []int32{1, 2}) || !slices.Equal(st.At, []int32{3, -1, 2}) || !slices.Equal(st.To, []int32{2, -1, 0}) ||
		!slices.Equal(st.Carry, []int32{0, -1}) {
		t.Fatalf("pos %v at %v to %v carry %v", st.Pos, st.At, st.To, st.Carry)
	}
	// Slot 2 waits where robot 1 stands, empty-handed: legal, not handed out.
	if err := m.Absorb(st, 1, 2, nil); err != nil || st.Carry[1] != -1 {
		t.Fatalf("err %v, carry %v", err, st.Carry)
	}
	// Delivered: the slot empties and robot 0's hands are free.
	if err := m.Absorb(st, 0, 2, []model.Sighting{{What: 0, Value: -1}}); err != nil || st.Carry[0] != -1 || st.At[0] != -1 {
		t.Fatalf("err %v, carry %v, at %v", err, st.Carry, st.At)
	}
}

func TestFlattenUnflatten(t *testing.T) {
	m := mustDefault(t, 4)
	rng := model.NewRNG(3)
	s, d := m.NewState(), m.NewState()
	m.Start(s, rng.Rand)
	u := make([]int, m.Robots())
	for range 15 {
		model.BaseJoint(m, s, u)
		m.Step(s, u, rng.Rand)
	}
	ints, reals := m.Flatten(s, []int32{42}, nil) // Flatten appends
	if len(ints) != 1+4+32 || ints[0] != 42 || len(reals) != 0 {
		t.Fatalf("Flatten: %d ints (first %d), %d reals", len(ints), ints[0], len(reals))
	}
	if err := m.Unflatten(d, ints[1:], reals); err != nil {
		t.Fatal(err)
	}
	ss, ds := s.(*State), d.(*State)
	if !slices.Equal(ss.Pos, ds.Pos) || !slices.Equal(ss.At, ds.At) || !slices.Equal(ss.To, ds.To) || !slices.Equal(ss.Carry, ds.Carry) {
		t.Fatalf("round trip: %+v, want %+v", ds, ss)
	}
	if !slices.ContainsFunc(ss.Carry, func(c int32) bool { return c >= 0 }) || !slices.ContainsFunc(ss.At, func(a int32) bool { return a >= 0 && a < 12 }) {
		t.Fatalf("the test should cover waiting and carried parcels: %+v", ss)
	}
}

func TestUnflattenErrors(t *testing.T) {
	m := parse(t, line(3, "robots: 2\ncapacity: 3\n"))
	good := []int32{0, 2, 1*3 + 2, -1, 4*3 + 0} // robots at s0, s2; slot 0 waits at s1 for s2; slot 2 on robot 1 for s0
	cases := []struct {
		name  string
		ints  []int32
		reals []float64
		want  string
	}{
		{"too few ints", good[:3], nil, "snapshot: 3 ints, want 5 (2 robots + 3 parcel slots)"},
		{"too many ints", append(slices.Clone(good), -1), nil, "snapshot: 6 ints, want 5 (2 robots + 3 parcel slots)"},
		{"no ints", nil, nil, "snapshot: 0 ints, want 5 (2 robots + 3 parcel slots)"},
		{"reals", good, []float64{1}, "snapshot: 1 reals, want 0 (a delivery state has none)"},
		{"robot off the map", []int32{0, 3, 5, -1, 12}, nil, "snapshot: robot 1 at 3, not a station (3 stations)"},
		{"bad code", []int32{0, 2, 5, -3, 12}, nil, "snapshot: slot 1: code -3 is neither -1 (empty) nor a parcel (0..14)"},
		{"waiting at destination", []int32{0, 2, 8, -1, 12}, nil, "snapshot: slot 0: code 8: a parcel waiting at its own destination s2"},
		{"two on one robot", []int32{0, 2, 5, 13, 12}, nil, "snapshot: robot 1 carries two parcels (slots 1 and 2); a robot carries one"},
	}
	d := m.NewState()
	if err := m.Unflatten(d, good, nil); err != nil {
		t.Fatal(err)
	}
	if c := d.(*State).Carry; !slices.Equal(c, []int32{-1, 2}) {
		t.Fatalf("Carry = %v, want [-1 2] (derived from the slots)", c)
	}
	for _, c := range cases {
		err := m.Unflatten(d, c.ints, c.reals)
		if err == nil || err.Error() != c.want {
			t.Errorf("%s: err = %v\nwant %s", c.name, err, c.want)
		}
		if got, _ := m.Flatten(d, nil, nil); !slices.Equal(got, good) || !slices.Equal(d.(*State).Carry, []int32{-1, 2}) {
			t.Errorf("%s: a rejected snapshot changed the state to %v", c.name, got)
		}
	}
}

// The coordinator's per-round work (Advance, Sense, Absorb, Flatten into
// reused buffers) allocates nothing either.
func TestFleetNoAllocations(t *testing.T) {
	m := mustDefault(t, 6)
	rng := model.NewRNG(5)
	y, z := m.NewState(), m.NewState()
	m.Start(y, rng.Rand)
	u := make([]int, m.Robots())
	seen := make([]model.Sighting, 0, m.Capacity())
	ints := make([]int32, 0, m.Robots()+m.Capacity())
	allocs := testing.AllocsPerRun(200, func() {
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
		if m.Unflatten(z, ints, nil) != nil {
			panic("unflatten")
		}
	})
	if allocs != 0 {
		t.Fatalf("the fleet round trip allocates %.1f times per step", allocs)
	}
}

// The observation README.md gives as an example means what it says.
func TestReadmeObservation(t *testing.T) {
	m := mustDefault(t, 3)
	s := start(m)
	if m.move(s.Pos[0], 1) != 1 {
		t.Fatal("control 1 at the hub does not drive to the mill")
	}
	if err := m.Absorb(s, 0, 1, []model.Sighting{{What: 0, Value: 41}, {What: 1, Value: 168}}); err != nil {
		t.Fatal(err)
	}
	if s.Pos[0] != 1 || m.StationName(int(s.At[0])) != "market" || m.StationName(int(s.To[0])) != "clinic" ||
		s.Carry[2] != 1 || m.StationName(int(s.To[1])) != "hub" {
		t.Fatalf("pos %v at %v to %v carry %v", s.Pos, s.At[:3], s.To[:3], s.Carry)
	}
}
