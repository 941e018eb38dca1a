package turn

import (
	"fmt"
	"slices"
	"strings"
	"testing"
	"time"

	"baton/sim/harbor"
	"baton/sim/model"
)

const fleet = "yard"

// rig is robot 1 of a 4-boat harbor fleet, with a valid state to start
// rounds on.
type rig struct {
	t    *testing.T
	m    *Machine
	mdl  *harbor.Model
	x    model.State
	ints []int32
}

func newRig(t *testing.T) *rig {
	t.Helper()
	mdl, err := harbor.Default(4)
	if err != nil {
		t.Fatal(err)
	}
	x := mdl.NewState()
	mdl.Start(x, model.NewRNG(1).Rand)
	ints, _ := mdl.Flatten(x, nil, nil)
	return &rig{t: t, m: New(Config{Fleet: fleet, Robot: 1, Model: mdl, Digest: "d1", Sender: "r1", Stale: 10 * time.Second}),
		mdl: mdl, x: x, ints: ints}
}

// start is a valid round start: order 0..3, 100ms per turn.
func (r *rig) start(epoch, round uint64, mode Mode) Start {
	return Start{Fleet: fleet, Epoch: epoch, Round: round, Sender: "coordinator", Scenario: "harbor",
		Ints: slices.Clone(r.ints), Order: []uint32{0, 1, 2, 3}, DeadlinesUs: []uint64{100e3, 200e3, 300e3, 400e3},
		Mode: mode, Params: Params{Samples: 4, Horizon: 5, Seed: 9}, Digest: "d1", Guess: "base"}
}

func (r *rig) step(ev Event) []Action {
	r.t.Helper()
	acts := r.m.Step(ev)
	checkActions(r.t, acts)
	return acts
}

func dec(epoch, round uint64, robot uint32, control int32) Decision {
	return Decision{Fleet: fleet, Epoch: epoch, Round: round, Robot: robot, Control: control, Sender: fmt.Sprint("r", robot)}
}

// heard delivers a decision on its own robot's subject.
func heard(now time.Duration, d Decision) GotDecision {
	return GotDecision{Now: now, Subject: int(d.Robot), Msg: d}
}

// checkActions holds for every Step: known action types, drops explained.
func checkActions(t *testing.T, acts []Action) {
	t.Helper()
	for _, a := range acts {
		switch a := a.(type) {
		case Drop:
			if !slices.Contains(Reasons(), a.Reason) {
				t.Fatalf("unknown reason %q", a.Reason)
			}
			if a.Detail == "" {
				t.Fatalf("drop without detail: %+v", a)
			}
		case Arm, Compute, Publish, SendReport, Began, Note, Late:
		default:
			t.Fatalf("unknown action %T", a)
		}
	}
}

func only[T Action](t *testing.T, acts []Action) T {
	t.Helper()
	var out []T
	for _, a := range acts {
		if v, ok := a.(T); ok {
			out = append(out, v)
		}
	}
	if len(out) != 1 {
		var zero T
		t.Fatalf("want one %T in %+v", zero, acts)
	}
	return out[0]
}

func dropOf(t *testing.T, acts []Action, want DropReason) {
	t.Helper()
	for _, a := range acts {
		if d, ok := a.(Drop); ok && d.Reason == want {
			return
		}
	}
	t.Fatalf("want a %q drop, got %+v", want, acts)
}

func TestBadRoundStarts(t *testing.T) {
	cases := []struct {
		name   string
		mutate func(*Start)
		want   DropReason
	}{
		{"foreign", func(s *Start) { s.Fleet = "other" }, DropForeign},
		{"round 0", func(s *Start) { s.Round = 0 }, DropMalformed},
		{"mode", func(s *Start) { s.Mode = 9 }, DropMalformed},
		{"absurd samples", func(s *Start) { s.Params.Samples = 1 << 31 }, DropBounds},
		{"no samples", func(s *Start) { s.Params.Samples = 0 }, DropBounds},
		{"negative horizon", func(s *Start) { s.Params.Horizon = -1 }, DropBounds},
		{"horizon", func(s *Start) { s.Params.Horizon = MaxHorizon + 1 }, DropBounds},
		{"work", func(s *Start) { s.Params.Samples, s.Params.Horizon = MaxSamples, MaxHorizon }, DropBounds},
		{"long order", func(s *Start) {
			s.Order = make([]uint32, MaxRobots+1)
			s.DeadlinesUs = make([]uint64, MaxRobots+1)
		}, DropBounds},
		{"big state", func(s *Start) { s.Reals = make([]float64, MaxStateValues+1) }, DropBounds},
		{"long name", func(s *Start) { s.Guess = strings.Repeat("g", MaxName+1) }, DropBounds},
		{"empty order", func(s *Start) { s.Order, s.DeadlinesUs = nil, nil }, DropMalformed},
		{"deadline count", func(s *Start) { s.DeadlinesUs = s.DeadlinesUs[:2] }, DropMalformed},
		{"robot out of range", func(s *Start) { s.Order[2] = 4 }, DropRange},
		{"robot twice", func(s *Start) { s.Order[2] = 0 }, DropMalformed},
		{"deadline too far", func(s *Start) { s.DeadlinesUs[3] = uint64(MaxDeadline/time.Microsecond) + 1 }, DropBounds},
		{"deadline huge", func(s *Start) { s.DeadlinesUs[3] = 1<<64 - 1 }, DropBounds},
		{"deadlines backwards", func(s *Start) { s.DeadlinesUs[2] = 1 }, DropMalformed},
		{"scenario", func(s *Start) { s.Scenario = "upkeep" }, DropScenario},
		{"digest", func(s *Start) { s.Digest = "d2" }, DropScenario},
		{"bad state", func(s *Start) { s.Ints[0] = -5 }, DropMalformed},
		{"short state", func(s *Start) { s.Ints = s.Ints[:3] }, DropMalformed},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			r := newRig(t)
			s := r.start(7, 5, Hybrid)
			c.mutate(&s)
			dropOf(t, r.step(GotStart{Now: 0, Msg: s}), c.want)
			if r.m.Round() != 0 || r.m.Counters().Drops[c.want] != 1 {
				t.Fatalf("round %d, counters %+v", r.m.Round(), r.m.Counters())
			}
			// Nothing was believed: a good start is taken at once.
			only[Began](t, r.step(GotStart{Now: 1, Msg: r.start(7, 5, Hybrid)}))
		})
	}
}

// The digest refusal is what the robot's software and /healthz are told.
func TestWrongScenarioRefusalIsShown(t *testing.T) {
	r := newRig(t)
	s := r.start(7, 1, Hybrid)
	s.Digest = "d2"
	r.step(GotStart{Msg: s})
	v := r.m.View(time.Millisecond, 0, false)
	if !v.Hold || !v.Done || !strings.Contains(v.Reason, "same scenario file") {
		t.Fatalf("view %+v", v)
	}
	if ok, why := r.m.Health(time.Millisecond); ok || !strings.Contains(why, "refusing rounds") {
		t.Fatalf("health %v %q", ok, why)
	}
}

// Freshness: a far-future round start is not believed, and the rounds
// after it are played as if it never came.
func TestFarFutureRoundIgnored(t *testing.T) {
	r := newRig(t)
	only[Began](t, r.step(GotStart{Now: 0, Msg: r.start(7, 5, Parallel)}))
	dropOf(t, r.step(GotStart{Now: 1, Msg: r.start(7, 5+RoundWindow+1, Parallel)}), DropFuture)
	dropOf(t, r.step(GotStart{Now: 2, Msg: r.start(7, 1<<62, Parallel)}), DropFuture)
	dropOf(t, r.step(GotStart{Now: 3, Msg: r.start(7, 4, Parallel)}), DropStale)
	dropOf(t, r.step(GotStart{Now: 3, Msg: r.start(7, 5, Parallel)}), DropDuplicate)
	for round := uint64(6); round < 10; round++ {
		b := only[Began](t, r.step(GotStart{Now: time.Duration(round) * time.Second, Msg: r.start(7, round, Parallel)}))
		if b.Resync || b.NewRun {
			t.Fatalf("round %d: %+v", round, b)
		}
	}
	// Within the window is believed: that is the window.
	only[Began](t, r.step(GotStart{Now: 20 * time.Second, Msg: r.start(7, 9+RoundWindow, Parallel)}))
}

// A bad start that did get in (here: the first one a fresh robot saw) costs
// at most ResyncAfter rounds: the real run keeps coming and is followed.
func TestResyncAfterBadStart(t *testing.T) {
	r := newRig(t)
	only[Began](t, r.step(GotStart{Now: 0, Msg: r.start(7, 1<<40, Parallel)}))
	for round := uint64(20); round < 20+ResyncAfter-1; round++ {
		dropOf(t, r.step(GotStart{Now: 1, Msg: r.start(7, round, Parallel)}), DropStale)
	}
	acts := r.step(GotStart{Now: 2, Msg: r.start(7, 20+ResyncAfter-1, Parallel)})
	if b := only[Began](t, acts); !b.Resync || b.Round != 20+ResyncAfter-1 {
		t.Fatalf("%+v", b)
	}
	only[Note](t, acts)
	if r.m.Counters().Resyncs != 1 {
		t.Fatal(r.m.Counters())
	}
	// Non-consecutive refused starts never resync.
	r2 := newRig(t)
	r2.step(GotStart{Msg: r2.start(7, 1<<40, Parallel)})
	for _, round := range []uint64{3, 9, 4, 10, 5, 5} {
		dropOf(t, r2.step(GotStart{Msg: r2.start(7, round, Parallel)}), DropStale)
	}
}

func TestCoordinatorRuns(t *testing.T) {
	r := newRig(t)
	r.step(GotStart{Now: 0, Msg: r.start(7, 40, Parallel)})
	// A restarted coordinator: larger epoch, rounds from 1.
	acts := r.step(GotStart{Now: 1, Msg: r.start(8, 1, Parallel)})
	if b := only[Began](t, acts); !b.NewRun || b.Round != 1 {
		t.Fatalf("%+v", b)
	}
	only[Note](t, acts)
	if v := r.m.View(2, 40, false); !v.Hold {
		t.Fatalf("the old run's round 40 is not this run's: %+v", v)
	}
	// The old run is over; a newer run far from round 1 is not believed.
	dropOf(t, r.step(GotStart{Now: 3, Msg: r.start(7, 41, Parallel)}), DropStale)
	dropOf(t, r.step(GotStart{Now: 3, Msg: r.start(9, 1000, Parallel)}), DropFuture)
	// A forged huge epoch that got in is left after ResyncAfter real rounds.
	r.step(GotStart{Now: 4, Msg: r.start(1<<63, 1, Parallel)})
	for round := uint64(2); round < 2+ResyncAfter; round++ {
		acts = r.step(GotStart{Now: 5, Msg: r.start(8, round, Parallel)})
	}
	if b := only[Began](t, acts); !b.Resync || r.m.Epoch() != 8 {
		t.Fatalf("%+v epoch %d", b, r.m.Epoch())
	}
}

// A restarted coordinator that continues the numbering from its durable
// log (a larger epoch, the round after the last one it closed) is believed
// near the round followed, and so are its early decisions; far from it is
// not.
func TestResumedRun(t *testing.T) {
	r := newRig(t)
	r.step(GotStart{Now: 0, Msg: r.start(7, 300, Sequential)})
	dropOf(t, r.step(GotStart{Now: 1, Msg: r.start(8, 301+RoundWindow, Sequential)}), DropFuture)
	r.step(heard(2, dec(8, 301, 0, 3)))
	acts := r.step(GotStart{Now: 3, Msg: r.start(8, 301, Sequential)})
	if b := only[Began](t, acts); !b.NewRun || b.Round != 301 {
		t.Fatalf("%+v", b)
	}
	if c := only[Compute](t, acts); c.Known[0] != 3 {
		t.Fatalf("the resumed run's early decision was not kept: %+v", c)
	}
	// The round in play when a coordinator died is played again by the
	// next run under its own epoch.
	if b := only[Began](t, r.step(GotStart{Now: 4, Msg: r.start(9, 301, Sequential)})); !b.NewRun || b.Round != 301 {
		t.Fatalf("%+v", b)
	}
}

func TestBadDecisions(t *testing.T) {
	r := newRig(t)
	r.step(GotStart{Now: 0, Msg: r.start(7, 5, Sequential)})
	long := dec(7, 5, 0, 1)
	long.Heard = make([]uint32, MaxRobots+1)
	cases := []struct {
		name string
		ev   GotDecision
		want DropReason
	}{
		{"foreign", heard(1, Decision{Fleet: "x", Epoch: 7, Round: 5}), DropForeign},
		{"too many heard", heard(1, long), DropBounds},
		{"robot out of range", heard(1, dec(7, 5, 4, 1)), DropRange},
		{"robot huge", heard(1, dec(7, 5, 1<<32-1, 1)), DropRange},
		{"subject", GotDecision{Now: 1, Subject: 2, Msg: dec(7, 5, 0, 1)}, DropSubject},
		{"no subject", GotDecision{Now: 1, Subject: -1, Msg: dec(7, 5, 0, 1)}, DropSubject},
		{"control", heard(1, dec(7, 5, 0, 5)), DropRange},
		{"negative control", heard(1, dec(7, 5, 0, -99)), DropRange},
		{"stale", heard(1, dec(7, 4, 0, 1)), DropStale},
		{"old run", heard(1, dec(6, 5, 0, 1)), DropStale},
		{"future", heard(1, dec(7, 7, 0, 1)), DropFuture},
		{"round 0", heard(1, dec(7, 0, 0, 1)), DropMalformed},
		{"other claims me", heard(1, Decision{Fleet: fleet, Epoch: 7, Round: 5, Robot: 1, Sender: "impostor"}), DropDuplicate},
	}
	for _, c := range cases {
		dropOf(t, r.step(c.ev), c.want)
	}
	// Own echo: silently ignored.
	if acts := r.step(heard(1, Decision{Fleet: fleet, Epoch: 7, Round: 5, Robot: 1, Sender: "r1"})); len(acts) != 0 {
		t.Fatal(acts)
	}
	// None of it counted as robot 0's decision: still waiting.
	if acts := r.step(heard(2, dec(7, 5, 0, 3))); only[Compute](t, acts).Known[0] != 3 {
		t.Fatal(acts)
	}
	dropOf(t, r.step(heard(3, dec(7, 5, 0, 2))), DropDuplicate)
	r2 := newRig(t)
	s := r2.start(7, 5, Hybrid)
	s.Order, s.DeadlinesUs = []uint32{1, 2}, []uint64{1e5, 2e5}
	r2.step(GotStart{Msg: s})
	dropOf(t, r2.step(heard(1, dec(7, 5, 3, 1))), DropNotInOrder)
}

func TestHybridTurn(t *testing.T) {
	r := newRig(t)
	acts := r.step(GotStart{Now: time.Second, Msg: r.start(7, 5, Hybrid)})
	arm := only[Arm](t, acts)
	if arm.At != time.Second+100*time.Millisecond || arm.Round != 5 || arm.Epoch != 7 {
		t.Fatalf("%+v", arm)
	}
	// A stale timer does nothing; the right one computes with a guess.
	if len(r.step(Timer{Now: arm.At, Epoch: 6, Round: 5})) != 0 {
		t.Fatal("old run's timer acted")
	}
	c := only[Compute](t, r.step(Timer{Now: arm.At, Epoch: 7, Round: 5}))
	if !slices.Equal(c.Guess, []int{0}) || c.Known[0] != -1 || c.Due != time.Second+200*time.Millisecond || c.State == nil {
		t.Fatalf("%+v", c)
	}
	// Robot 0 arrives late: counted, not used.
	if l := only[Late](t, r.step(heard(arm.At+1, dec(7, 5, 0, 2)))); l.Robot != 0 || r.m.Counters().Late != 1 {
		t.Fatal("late not counted")
	}
	p := only[Publish](t, r.step(Computed{Now: arm.At + 5, Epoch: 7, Round: 5, Control: 3, Took: 5 * time.Microsecond}))
	if p.Decision.Control != 3 || !slices.Equal(p.Decision.Guessed, []uint32{0}) || len(p.Decision.Heard) != 0 || p.Decision.Epoch != 7 {
		t.Fatalf("%+v", p)
	}
	v := r.m.View(arm.At+6, 5, false)
	if !v.Done || v.Hold || v.Control != 3 || v.Action != "E" || !v.Decided {
		t.Fatalf("%+v", v)
	}
	// An out-of-range control from the rollout is never published.
	r.step(GotStart{Now: 2 * time.Second, Msg: r.start(7, 6, Parallel)})
	acts = r.step(Computed{Now: 2 * time.Second, Epoch: 7, Round: 6, Control: 9})
	if len(acts) != 1 || !only[Note](t, acts).Warn {
		t.Fatal(acts)
	}
}

func TestSequentialWaitsUntilClose(t *testing.T) {
	r := newRig(t)
	acts := r.step(GotStart{Now: 0, Msg: r.start(7, 5, Sequential)})
	if len(acts) != 1 {
		t.Fatalf("sequential arms nothing, computes nothing: %+v", acts)
	}
	if v := r.m.View(time.Second, 5, false); v.Done || !strings.Contains(v.Reason, "no decision") {
		t.Fatalf("%+v", v)
	}
	// The coordinator gave up on robot 0: everyone after it held.
	cl := Close{Fleet: fleet, Epoch: 7, Round: 5, Controls: make([]int32, 4), Held: []uint32{0, 1, 2, 3}, LatencyUs: 400000, Stalled: 1}
	if acts := r.step(GotClose{Now: time.Second, Msg: cl}); len(acts) != 0 {
		t.Fatal(acts)
	}
	v := r.m.View(time.Second, 5, true)
	if !v.Done || !v.Hold || v.LatencyUs != 400000 || v.Stalled != 0 || !strings.Contains(v.Reason, "waited for robot 0") {
		t.Fatalf("%+v", v)
	}
	// Robot 0's decision after the close starts nothing.
	if acts := r.step(heard(2*time.Second, dec(7, 5, 0, 1))); len(acts) != 0 {
		t.Fatal(acts)
	}
}

func TestParallelGuessesEveryone(t *testing.T) {
	r := newRig(t)
	r.step(heard(0, dec(7, 5, 0, 1))) // early: kept, but parallel never waits
	acts := r.step(GotStart{Now: 0, Msg: r.start(7, 5, Parallel)})
	c := only[Compute](t, acts)
	if !slices.Equal(c.Guess, []int{0}) || c.Known[0] != -1 {
		t.Fatalf("%+v", c)
	}
}

func TestEarlyDecisions(t *testing.T) {
	r := newRig(t)
	r.step(GotStart{Now: 0, Msg: r.start(7, 5, Sequential)})
	r.step(heard(1, dec(7, 6, 0, 2)))
	// The same decision again is a repeat (robots repeat until the close).
	if acts := r.step(heard(1, dec(7, 6, 0, 2))); len(acts) != 0 || r.m.Counters().Repeats != 1 {
		t.Fatalf("repeat: %v, %d repeats", acts, r.m.Counters().Repeats)
	}
	c := only[Compute](t, r.step(GotStart{Now: 2, Msg: r.start(7, 6, Sequential)}))
	if c.Known[0] != 2 {
		t.Fatalf("%+v", c)
	}
	// Kept for a round that never came: dropped as stale when another starts.
	r.step(heard(3, dec(7, 7, 0, 9)))
	dropOf(t, r.step(GotStart{Now: 4, Msg: r.start(7, 8, Sequential)}), DropStale)
	// Checked when its round starts: an impossible control is dropped then.
	r.step(heard(5, dec(7, 9, 0, 9)))
	dropOf(t, r.step(GotStart{Now: 6, Msg: r.start(7, 9, Sequential)}), DropRange)
	// Round 1 of a newer run is kept too.
	r.step(heard(7, dec(8, 1, 0, 4)))
	if c := only[Compute](t, r.step(GotStart{Now: 8, Msg: r.start(8, 1, Sequential)})); c.Known[0] != 4 {
		t.Fatalf("%+v", c)
	}
}

func TestBadCloses(t *testing.T) {
	r := newRig(t)
	cl := func(round uint64, mutate func(*Close)) GotClose {
		c := Close{Fleet: fleet, Epoch: 7, Round: round, Controls: []int32{1, 2, 3, 4}, Held: []uint32{}, LatencyUs: 100}
		if mutate != nil {
			mutate(&c)
		}
		return GotClose{Now: 1, Msg: c}
	}
	dropOf(t, r.step(cl(5, nil)), DropFuture) // nothing started
	r.step(GotStart{Now: 0, Msg: r.start(7, 5, Parallel)})
	cases := []struct {
		name string
		ev   GotClose
		want DropReason
	}{
		{"foreign", cl(5, func(c *Close) { c.Fleet = "x" }), DropForeign},
		{"future", cl(7, nil), DropFuture},
		{"far future", cl(1<<60, nil), DropFuture},
		{"newer run", cl(5, func(c *Close) { c.Epoch = 8 }), DropFuture},
		{"older run", cl(5, func(c *Close) { c.Epoch = 6 }), DropStale},
		{"over", cl(4, nil), DropStale},
		{"count", cl(5, func(c *Close) { c.Controls = c.Controls[:3] }), DropMalformed},
		{"no such control", cl(5, func(c *Close) { c.Controls[1] = -99 }), DropRange},
		{"control too big", cl(5, func(c *Close) { c.Controls[2] = 5 }), DropRange},
		{"held range", cl(5, func(c *Close) { c.Held = []uint32{4} }), DropRange},
		{"held twice", cl(5, func(c *Close) { c.Held = []uint32{2, 2} }), DropMalformed},
		{"latency", cl(5, func(c *Close) { c.LatencyUs = 1 << 62 }), DropBounds},
		{"stalled", cl(5, func(c *Close) { c.Stalled = 9 }), DropRange},
		{"long", cl(5, func(c *Close) { c.Controls = make([]int32, MaxRobots+1) }), DropBounds},
	}
	for _, c := range cases {
		dropOf(t, r.step(c.ev), c.want)
		if v := r.m.View(2, 5, true); v.Closed {
			t.Fatalf("%s: closed by a bad close: %+v", c.name, v)
		}
	}
	// A close that gives this robot a control it did not decide is not the
	// coordinator's: the robot never acts on it.
	dropOf(t, r.step(cl(5, nil)), DropContradicts)
	r.step(Computed{Now: 1, Epoch: 7, Round: 5, Control: 3})
	dropOf(t, r.step(cl(5, nil)), DropContradicts)
	if v := r.m.View(2, 5, true); v.Closed {
		t.Fatalf("closed by a contradicting close: %+v", v)
	}
	agree := cl(5, func(c *Close) { c.Controls[1] = 3 })
	if acts := r.step(agree); len(acts) != 0 {
		t.Fatal(acts)
	}
	if acts := r.step(agree); len(acts) != 0 || r.m.Counters().Repeats != 1 {
		t.Fatalf("a repeated close: %v", acts) // the coordinator repeats closes until every report is in
	}
	dropOf(t, r.step(cl(5, func(c *Close) { c.Controls[1] = 3; c.Held = []uint32{1} })), DropDuplicate)
	if v := r.m.View(2, 5, true); !v.Closed || v.Control != 3 || v.Action != "E" || v.Hold {
		t.Fatalf("%+v", v)
	}
	// A spray of future closes keeps nothing.
	for i := range uint64(10000) {
		r.step(cl(6+i, nil))
	}
	if len(r.m.hist) != 1 {
		t.Fatalf("history grew to %d", len(r.m.hist))
	}
}

// The previous round's close feeds the last source; held robots are -1.
func TestLastControls(t *testing.T) {
	r := newRig(t)
	r.step(GotStart{Now: 0, Msg: r.start(7, 5, Parallel)})
	r.step(Computed{Now: 1, Epoch: 7, Round: 5, Control: 2})
	r.step(GotClose{Now: 1, Msg: Close{Fleet: fleet, Epoch: 7, Round: 5, Controls: []int32{1, 2, 0, 4}, Held: []uint32{2}}})
	c := only[Compute](t, r.step(GotStart{Now: 2, Msg: r.start(7, 6, Parallel)}))
	if !slices.Equal(c.Last, []int{1, 2, -1, 4}) {
		t.Fatalf("%v", c.Last)
	}
	// Without round 6's close, round 7 has no last controls.
	if c := only[Compute](t, r.step(GotStart{Now: 3, Msg: r.start(7, 7, Parallel)})); c.Last != nil {
		t.Fatalf("%v", c.Last)
	}
}

func TestHistoryBounded(t *testing.T) {
	r := newRig(t)
	for round := uint64(1); round < 3*History; round++ {
		r.step(GotStart{Now: time.Duration(round), Msg: r.start(7, round, Parallel)})
	}
	if len(r.m.hist) != History {
		t.Fatalf("%d rounds kept", len(r.m.hist))
	}
}

func TestReportsAndHello(t *testing.T) {
	r := newRig(t)
	hello := func(now time.Duration, epoch uint64) []Action {
		return r.step(GotHello{Now: now, Msg: Hello{Fleet: fleet, Epoch: epoch, Sender: "coordinator"}})
	}
	if acts := hello(0, 7); len(acts) != 0 {
		t.Fatal("nothing reported yet, nothing to re-send:", acts)
	}
	// Before any round, any round number is believed (the robot's software
	// may be mid-run when agentd restarts).
	if _, err := r.m.Observe(0, 12, 3, 0, nil); err != nil {
		t.Fatal(err)
	}
	r.step(GotStart{Now: 0, Msg: r.start(7, 5, Parallel)})
	for _, bad := range []struct {
		round   uint64
		pos     int32
		applied int
		seen    []model.Sighting
		want    string
	}{
		{7, 3, 0, nil, "current round is 5"},
		{3, 3, 0, nil, "current round is 5"},
		{5, 3, 5, nil, "applied control 5"},
		{5, -1, 0, nil, "not a cell"},
		{5, 3, 0, []model.Sighting{{What: 99, Value: 1}}, "does not exist"},
		{5, 3, 0, make([]model.Sighting, MaxSightings+1), "sightings"},
	} {
		if _, err := r.m.Observe(1, bad.round, bad.pos, bad.applied, bad.seen); err == nil || !strings.Contains(err.Error(), bad.want) {
			t.Errorf("report %+v: %v", bad, err)
		}
	}
	acts, err := r.m.Observe(1, 5, 3, 2, nil)
	if err != nil {
		t.Fatal(err)
	}
	s := only[SendReport](t, acts[:1])
	if s.Report.Epoch != 7 || s.Report.Round != 5 || s.Report.Robot != 1 || s.Resent {
		t.Fatalf("%+v %v", s, err)
	}
	if a := only[Arm](t, acts[1:]); a.Kind != RepeatReport || a.Round != 5 {
		t.Fatalf("repeat %+v", a)
	}
	dropOf(t, r.step(GotHello{Now: 2, Msg: Hello{Fleet: "x"}}), DropForeign)
	dropOf(t, hello(2, 6), DropStale)
	rs := only[SendReport](t, hello(2, 8))
	if !rs.Resent || rs.Report.Round != 5 || rs.Report.Position != 3 {
		t.Fatalf("%+v", rs)
	}
	dropOf(t, hello(2+HelloGap/2, 8), DropTooFrequent)
	only[SendReport](t, hello(2+HelloGap, 8))
}

func TestViews(t *testing.T) {
	r := newRig(t)
	if v := r.m.View(0, 0, false); v.Done || !v.Hold {
		t.Fatalf("%+v", v)
	}
	if ok, why := r.m.Health(0); !ok || why != "waiting for the first round" {
		t.Fatal(why)
	}
	s := r.start(7, 5, Parallel)
	s.Order, s.DeadlinesUs = []uint32{0, 2}, []uint64{1e5, 2e5}
	r.step(GotStart{Now: time.Second, Msg: s}) // robot 1 sits out
	if v := r.m.View(time.Second, 5, false); !v.Done || !v.Hold || v.Reason != "not in this round's order" {
		t.Fatalf("%+v", v)
	}
	if v := r.m.View(time.Second, 5, true); v.Done {
		t.Fatalf("asked for the close: wait for it %+v", v)
	}
	if v := r.m.View(time.Second, 6, false); v.Done || !strings.Contains(v.Reason, "has not started") {
		t.Fatalf("%+v", v)
	}
	r.step(GotStart{Now: 2 * time.Second, Msg: r.start(7, 6, Parallel)})
	r.step(Computed{Now: 2 * time.Second, Epoch: 7, Round: 6, Control: 4})
	if v := r.m.View(2*time.Second, 5, false); !v.Hold || !strings.Contains(v.Reason, "is over") {
		t.Fatalf("old rounds are never served: %+v", v)
	}
	if v := r.m.View(2*time.Second, 0, false); v.Hold || v.Control != 4 || v.Round != 6 {
		t.Fatalf("%+v", v)
	}
	late := 2*time.Second + 11*time.Second
	if v := r.m.View(late, 0, false); !v.Hold || !strings.Contains(v.Reason, "coordinator gone") {
		t.Fatalf("a stale decision is not served: %+v", v)
	}
	if ok, why := r.m.Health(late); ok || !strings.Contains(why, "holding") {
		t.Fatal(why)
	}
}

// Two different decisions for one robot in one round: one is forged, and
// neither is used; the robot is guessed as if unheard.
func TestConflictingDecisions(t *testing.T) {
	r := newRig(t)
	// For the next round, before it starts.
	r.step(GotStart{Now: 0, Msg: r.start(7, 5, Hybrid)})
	r.step(heard(1, dec(7, 6, 0, 3)))
	dropOf(t, r.step(heard(1, dec(7, 6, 0, 2))), DropDuplicate)
	acts := r.step(GotStart{Now: time.Second, Msg: r.start(7, 6, Hybrid)})
	if len(of[Compute](acts)) != 0 {
		t.Fatalf("a conflicted predecessor is not heard: %+v", acts)
	}
	c := only[Compute](t, r.step(Timer{Now: time.Second + 100*time.Millisecond, Epoch: 7, Round: 6}))
	if c.Known[0] != -1 || !slices.Equal(c.Guess, []int{0}) {
		t.Fatalf("%+v", c)
	}
	// In the current round, while waiting.
	r2 := newRig(t)
	s := r2.start(7, 5, Hybrid)
	s.Order = []uint32{0, 2, 1, 3}
	r2.step(GotStart{Msg: s})
	r2.step(heard(1, dec(7, 5, 0, 1)))
	dropOf(t, r2.step(heard(2, dec(7, 5, 0, 4))), DropDuplicate)
	if acts := r2.step(heard(3, dec(7, 5, 2, 1))); len(of[Compute](acts)) != 0 {
		t.Fatalf("computed without robot 0: %+v", acts)
	}
	c = only[Compute](t, r2.step(Timer{Now: 200 * time.Millisecond, Epoch: 7, Round: 5}))
	if c.Known[0] != -1 || c.Known[2] != 1 || !slices.Equal(c.Guess, []int{0}) {
		t.Fatalf("%+v", c)
	}
}

func of[T Action](acts []Action) []T {
	var out []T
	for _, a := range acts {
		if v, ok := a.(T); ok {
			out = append(out, v)
		}
	}
	return out
}

// Lossy links: a robot repeats its decision until the close and its
// report until the next round starts; a start heard first as a late copy
// keeps the round's deadlines; a close for a round whose start was lost
// ends the software's wait with a hold.
func TestRepeats(t *testing.T) {
	r := newRig(t)
	s := r.start(7, 5, Hybrid)
	s.AgeUs = 30000 // the first copy to arrive left 30 ms after the round began
	acts := r.step(GotStart{Now: time.Second, Msg: s})
	arm := only[Arm](t, acts)
	if want := time.Second - 30*time.Millisecond + time.Duration(s.DeadlinesUs[0])*time.Microsecond; arm.At != want {
		t.Fatalf("deadline at %v, want %v (from the round's start, not the copy's)", arm.At, want)
	}
	if acts := r.step(GotStart{Now: time.Second, Msg: s}); len(acts) != 0 || r.m.Counters().Repeats != 1 {
		t.Fatalf("a second copy: %v", acts)
	}
	only[Compute](t, r.step(Timer{Now: arm.At, Epoch: 7, Round: 5}))
	acts = r.step(Computed{Now: arm.At + 1, Epoch: 7, Round: 5, Control: 2})
	pub, rep := only[Publish](t, acts[:1]), only[Arm](t, acts[1:])
	if pub.Repeat || rep.Kind != RepeatDecision {
		t.Fatalf("%+v %+v", pub, rep)
	}
	again := r.step(Timer{Now: rep.At, Epoch: 7, Round: 5, Kind: RepeatDecision})
	if p := only[Publish](t, again[:1]); !p.Repeat || p.Decision.Control != 2 {
		t.Fatalf("repeat %+v", p)
	}
	closeMsg := Close{Fleet: "yard", Epoch: 7, Round: 5, Sender: "coordinator", Controls: make([]int32, 4)}
	closeMsg.Controls[1] = 2
	r.step(GotClose{Now: rep.At + 1, Msg: closeMsg})
	if acts := r.step(Timer{Now: rep.At + 2, Epoch: 7, Round: 5, Kind: RepeatDecision}); len(acts) != 0 {
		t.Fatalf("repeating after the close: %v", acts)
	}
	obs, err := r.m.Observe(rep.At+3, 5, 3, 2, nil)
	if err != nil {
		t.Fatal(err)
	}
	ra := only[Arm](t, obs[1:])
	if acts := r.step(Timer{Now: ra.At, Epoch: 7, Round: 5, Kind: RepeatReport}); len(only[SendReport](t, acts[:1]).Report.Seen) != 0 {
		t.Fatal(acts)
	}
	// Round 6's start is lost; its close comes: the wait for round 6 ends.
	if v := r.m.View(ra.At, 6, true); v.Done {
		t.Fatalf("done before anything about round 6: %+v", v)
	}
	closeMsg.Round = 6
	if acts := r.step(GotClose{Now: ra.At, Msg: closeMsg}); len(acts) != 0 {
		t.Fatal(acts)
	}
	if v := r.m.View(ra.At, 6, true); !v.Done || !v.Hold || !strings.Contains(v.Reason, "before its start") {
		t.Fatalf("%+v", v)
	}
	// Round 7 starts: the report of round 5 is no longer repeated.
	r.step(GotStart{Now: ra.At + 1, Msg: r.start(7, 7, Parallel)})
	if acts := r.step(Timer{Now: ra.At + 2, Epoch: 7, Round: 5, Kind: RepeatReport}); len(acts) != 0 {
		t.Fatalf("report repeated after a newer round started: %v", acts)
	}
}
