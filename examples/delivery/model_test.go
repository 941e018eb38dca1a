package delivery

import (
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"baton/agentd/decide"
	"baton/sim/episode"
	"baton/sim/model"
)

func TestDefaultDepot(t *testing.T) {
	m := mustDefault(t, 0)
	if m.Name() != "delivery" || m.Robots() != 3 || m.Stations() != 12 || m.MaxControls() != 5 ||
		m.Capacity() != 32 || m.Horizon() != 60 || m.Discount() != 1 {
		t.Fatalf("depot: %d robots, %d stations, %d controls, %d slots, horizon %d, discount %g",
			m.Robots(), m.Stations(), m.MaxControls(), m.Capacity(), m.Horizon(), m.Discount())
	}
	s := start(m)
	if !slices.Equal(s.Pos, []int32{0, 0, 0}) || s.At[0] != 3 || s.At[1] != 4 || s.At[2] != 10 || s.At[3] != -1 {
		t.Fatalf("start: robots %v, slots %v", s.Pos, s.At[:4])
	}
	// Hub to lighthouse: 5 hops, first to the mill (the lower-index
	// neighbour of the two on shortest paths), control 1.
	if m.Distance(0, 11) != 5 || m.Toward(0, 11) != 1 || m.Neighbours(0)[0] != 1 {
		t.Errorf("hub to lighthouse: %d hops, first move %d", m.Distance(0, 11), m.Toward(0, 11))
	}
	if got := mustDefault(t, 7); got.Robots() != 7 {
		t.Errorf("Default(7) has %d robots", got.Robots())
	}
}

// One step in the documented order: move, drop-off, pick-up (nearest
// destination first, robots in order), cost, arrivals.
func TestStepOrderOfEvents(t *testing.T) {
	// s0 - s1 - s2 - s3; nobody sends, so no arrivals disturb the check.
	m := parse(t, line(4, `
robots: 2
start: [s0, s3]
send: 0
wait_cost: 2
ride_cost: 1
capacity: 4
parcels:
  - {at: s1, to: s3}
  - {at: s1, to: s2}
  - {at: s2, to: s0}
`))
	s := start(m)
	u := []int{1, 0} // robot 0 s0 -> s1 (its only neighbour); robot 1 stays at s3
	rng := rand.New(rand.NewPCG(1, 2))
	// Robot 0 picks up the parcel for s2 (one hop) before the one for s3.
	if c := m.Step(s, u, rng); c != 2*2+1 {
		t.Errorf("cost %g, want 2 waiting x 2 + 1 riding", c)
	}
	if s.Pos[0] != 1 || s.Carry[0] != 1 || s.At[1] != int32(m.n) || s.Carry[1] != -1 {
		t.Fatalf("after step 1: pos %v carry %v at %v", s.Pos, s.Carry, s.At)
	}
	// Robot 0 drives on to s2 (control 2: neighbours of s1 are s0, s2),
	// delivers, and takes the parcel waiting there for s0 at once.
	u = []int{2, 0}
	if c := m.Step(s, u, rng); c != 2+1 {
		t.Errorf("cost %g, want 1 waiting x 2 + 1 riding", c)
	}
	if s.Pos[0] != 2 || s.Carry[0] != 2 || s.At[1] != -1 || s.To[1] != -1 || s.At[2] != int32(m.n) {
		t.Fatalf("after step 2: pos %v carry %v at %v to %v", s.Pos, s.Carry, s.At, s.To)
	}
	// Two empty robots at one station with one parcel: the lower robot wins.
	m2 := parse(t, line(3, "robots: 2\nstart: [s0, s0]\nsend: 0\nparcels: [{at: s1, to: s2}]\n"))
	s = start(m2)
	m2.Step(s, []int{1, 1}, rng)
	if s.Carry[0] != 0 || s.Carry[1] != -1 {
		t.Errorf("carry %v: robot 0 should have the parcel", s.Carry)
	}
	if m2.ControlName(s, 0, 0) != "stay" || m2.ControlName(s, 0, 2) != "to s2" || m2.ControlName(s, 0, 3) != "control 3 (invalid)" {
		t.Errorf("control names %q %q %q", m2.ControlName(s, 0, 0), m2.ControlName(s, 0, 2), m2.ControlName(s, 0, 3))
	}
}

// A control out of range stays (a guess from a model trained elsewhere
// must not crash a simulation).
func TestInvalidControlStays(t *testing.T) {
	m := mustDefault(t, 3)
	s := start(m)
	rng := rand.New(rand.NewPCG(3, 4))
	m.Step(s, []int{-1, 9, m.NumControls(s, 2)}, rng)
	if !slices.Equal(s.Pos, []int32{0, 0, 0}) {
		t.Fatalf("robots moved on invalid controls: %v", s.Pos)
	}
	if p := m.Aim(s, 0, 7); p != m.Spot(s, 0) {
		t.Errorf("Aim of an invalid control %v, want the robot's spot %v", p, m.Spot(s, 0))
	}
}

// Common random numbers: two uniforms per station per step, whatever the
// controls, so the stream stays in step across candidates.
func TestStepDrawsTwoUniformsPerStation(t *testing.T) {
	m := mustDefault(t, 3)
	var after []float64
	for _, u := range [][]int{{0, 0, 0}, {1, 2, 0}, {2, 2, 1}} {
		s := start(m)
		rng := rand.New(rand.NewPCG(5, 6))
		for range 8 {
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
	// Exactly 2 per station: replay by hand.
	s := start(m)
	rng := rand.New(rand.NewPCG(5, 6))
	m.Step(s, []int{0, 0, 0}, rng)
	ref := rand.New(rand.NewPCG(5, 6))
	for range 2 * m.Stations() {
		ref.Float64()
	}
	if rng.Float64() != ref.Float64() {
		t.Error("Step does not draw exactly 2 uniforms per station")
	}
}

// Arrivals follow send and the receive weights: frequencies within 4.5
// standard errors (the seed is fixed anyway).
func TestArrivalFrequencies(t *testing.T) {
	m := parse(t, `
stations:
  - {name: a, x: 0, y: 0, send: 0.3, receive: 1}
  - {name: b, x: 1, y: 0, send: 0, receive: 3}
  - {name: c, x: 2, y: 0, send: 0, receive: 1}
roads: [[a, b], [b, c]]
robots: 1
start: [b]
capacity: 4
`)
	rng := rand.New(rand.NewPCG(7, 8))
	const trials = 40000
	appeared, toB := 0, 0
	s := m.NewState().(*State)
	for range trials {
		m.Start(s, nil)
		m.Step(s, []int{0}, rng)
		if s.At[0] == 0 {
			appeared++
			if s.To[0] == 1 {
				toB++
			}
			if s.To[0] == 0 {
				t.Fatal("a parcel for its own origin")
			}
		}
		if s.At[1] != -1 {
			t.Fatal("only station a sends, one parcel per step at most")
		}
	}
	check := func(what string, hits, n int, p float64) {
		f := float64(hits) / float64(n)
		if tol := 4.5 * math.Sqrt(p*(1-p)/float64(n)); math.Abs(f-p) > tol {
			t.Errorf("%s: frequency %.4f, want %.4f +- %.4f", what, f, p, tol)
		}
	}
	check("arrivals at a", appeared, trials, 0.3)
	check("destination b", toB, appeared, 0.75)
}

// Full slots turn parcels away; nothing else changes.
func TestFullCapacityTurnsAway(t *testing.T) {
	m := parse(t, line(3, "robots: 1\nstart: [s0]\ncapacity: 1\nsend: 1\n"))
	s := start(m)
	rng := rand.New(rand.NewPCG(9, 9))
	m.Step(s, []int{0}, rng) // s0's parcel fills the only slot; s1, s2's are turned away
	if s.At[0] != 0 {
		t.Fatalf("slot 0 at %d, want the parcel from s0", s.At[0])
	}
	m.Step(s, []int{0}, rng) // robot 0 picks it up; the slot stays taken
	if s.Carry[0] != 0 || s.At[0] != int32(m.n) {
		t.Fatalf("carry %v at %v", s.Carry, s.At)
	}
}

// With nobody sending, the episode ends once the start parcels are
// delivered; Step and Advance then leave the state alone at cost 0.
func TestTerminal(t *testing.T) {
	m := parse(t, line(5, "robots: 2\nstart: [s0, s4]\nsend: 0\nparcels: [{at: s1, to: s4}, {at: s3, to: s0}]\n"))
	s := start(m)
	u := make([]int, 2)
	rng := rand.New(rand.NewPCG(1, 1))
	steps := 0
	for !m.Terminal(s) {
		if steps++; steps > 20 {
			t.Fatal("base does not finish two parcels on a line of 5")
		}
		model.BaseJoint(m, s, u)
		m.Step(s, u, rng)
	}
	before := slices.Clone(s.Pos)
	if c := m.Step(s, []int{1, 1}, rng); c != 0 || !slices.Equal(s.Pos, before) {
		t.Errorf("Step on a terminal state: cost %g, robots %v -> %v", c, before, s.Pos)
	}
	if c := m.Advance(s, []int{1, 1}); c != 0 || !slices.Equal(s.Pos, before) {
		t.Errorf("Advance on a terminal state: cost %g", c)
	}
	if m.TerminalCost(s) != 0 {
		t.Errorf("terminal cost %g", m.TerminalCost(s))
	}
	if mustDefault(t, 3).Terminal(s) {
		t.Error("the depot sends parcels: never terminal")
	}
}

func TestBasePolicy(t *testing.T) {
	m := mustDefault(t, 3)
	s := m.NewState().(*State)
	m.Start(s, nil)
	// Empty robots at the hub all head for the nearest waiting parcel
	// (market, 2 hops; library is 2 too but in a later slot): herding.
	for r := range 3 {
		c := m.Base(s, r)
		next := m.move(s.Pos[r], c)
		if m.Distance(int(next), 3) != 1 {
			t.Errorf("robot %d: control %d to %s, not toward the market", r, c, m.StationName(int(next)))
		}
	}
	// A loaded robot heads for the destination; every step one hop closer.
	rng := rand.New(rand.NewPCG(2, 3))
	u := make([]int, 3)
	for range 40 {
		model.BaseJoint(m, s, u)
		for r := range 3 {
			if slot := s.Carry[r]; slot >= 0 {
				d0 := m.Distance(int(s.Pos[r]), int(s.To[slot]))
				if d1 := m.Distance(int(m.move(s.Pos[r], u[r])), int(s.To[slot])); d1 != d0-1 {
					t.Fatalf("robot %d carrying to %s: %d hops -> %d", r, m.StationName(int(s.To[slot])), d0, d1)
				}
			}
		}
		m.Step(s, u, rng)
	}
	// Nothing waiting, nothing carried: stay.
	m.Start(s, nil)
	for i := range s.At {
		s.At[i], s.To[i] = -1, -1
	}
	if c := m.Base(s, 1); c != 0 {
		t.Errorf("idle robot moves: %d", c)
	}
	// Standing on a waiting parcel: stay (it is picked up at the step's end).
	s.At[5], s.To[5] = 0, 7
	if c := m.Base(s, 0); c != 0 {
		t.Errorf("robot on a waiting parcel moves: %d", c)
	}
}

// The base policy delivers: over seeded episodes it costs clearly less
// than robots standing at the hub.
func TestBaseBeatsIdle(t *testing.T) {
	m := mustDefault(t, 3)
	var base, idle float64
	for i := range 10 {
		seed := episode.Seed(11, i)
		rb, err := episode.Run(m, decide.Base{M: m}, seed, nil)
		if err != nil {
			t.Fatal(err)
		}
		ri, err := episode.Run(m, stay{}, seed, nil)
		if err != nil {
			t.Fatal(err)
		}
		base += rb.Cost
		idle += ri.Cost
	}
	t.Logf("mean cost over 10 episodes: base %.1f, idle %.1f", base/10, idle/10)
	if base > 0.6*idle {
		t.Errorf("base %.1f is not clearly below idle %.1f", base, idle)
	}
}

type stay struct{}

func (stay) Name() string { return "stay" }
func (stay) Decide(_ model.State, _ int, out []int) (decide.Stats, error) {
	clear(out)
	return decide.Stats{}, nil
}

func TestTerminalCost(t *testing.T) {
	m := parse(t, line(4, "robots: 1\nstart: [s0]\nsend: 0\nwait_cost: 2\nride_cost: 3\nparcels: [{at: s2, to: s3}]\n"))
	s := start(m)
	// Waits 2 hops for the robot (x2), then rides 1 hop (x3).
	if c := m.TerminalCost(s); c != 2*2+3*1 {
		t.Errorf("terminal cost %g, want 7", c)
	}
}

// Step, Base, NumControls, CopyState (and Terminal, TerminalCost) never
// allocate: they run millions of times per decision.
func TestNoAllocations(t *testing.T) {
	m := mustDefault(t, 6)
	s, x := m.NewState(), m.NewState()
	m.Start(s, nil)
	u := make([]int, m.Robots())
	rng := model.NewRNG(9)
	allocs := testing.AllocsPerRun(2000, func() {
		model.BaseJoint(m, s, u)
		m.Step(s, u, rng.Rand)
		_ = m.NumControls(s, 0)
		_ = m.Terminal(s)
		_ = m.TerminalCost(s)
		m.CopyState(x, s)
	})
	if allocs != 0 {
		t.Errorf("Step+Base+NumControls+CopyState allocate %g times per run", allocs)
	}
}

func BenchmarkStep(b *testing.B) {
	m := mustDefault(b, 6)
	s := m.NewState()
	m.Start(s, nil)
	u := make([]int, m.Robots())
	rng := model.NewRNG(1)
	b.ReportAllocs()
	for b.Loop() {
		model.BaseJoint(m, s, u)
		m.Step(s, u, rng.Rand)
	}
	b.ReportMetric(float64(b.N*m.Robots())/b.Elapsed().Seconds(), "robot-steps/s")
}
