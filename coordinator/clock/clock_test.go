package clock

import (
	"flag"
	"io"
	"slices"
	"strings"
	"testing"
	"time"

	"baton/agentd/decide"
	"baton/agentd/turn"
	"baton/sim/harbor"
	"baton/sim/model"
)

const epoch = 1000

type rig struct {
	t    *testing.T
	c    *Machine
	m    *harbor.Model
	now  time.Duration
	acts []Action // everything so far
}

func config(t *testing.T, robots int) Config {
	m, err := harbor.Default(robots)
	if err != nil {
		t.Fatal(err)
	}
	cfg := DefaultConfig()
	cfg.Fleet, cfg.Epoch, cfg.Model, cfg.Digest = "yard", epoch, m, "d1"
	cfg.Decide = decide.Config{Samples: 2, Horizon: 3}
	cfg.TurnBudget = 100 * time.Millisecond
	return cfg
}

func newRig(t *testing.T, cfg Config) *rig {
	t.Helper()
	if err := cfg.Validate(); err != nil {
		t.Fatal(err)
	}
	return &rig{t: t, c: New(cfg), m: cfg.Model.(*harbor.Model)}
}

func (r *rig) step(ev Event) []Action {
	r.t.Helper()
	acts := r.c.Step(ev)
	r.acts = append(r.acts, acts...)
	return acts
}

// at moves the clock and ticks.
func (r *rig) at(d time.Duration) []Action {
	r.now = d
	return r.step(Tick{Now: d})
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

func one[T Action](t *testing.T, acts []Action) T {
	t.Helper()
	v := of[T](acts)
	if len(v) != 1 {
		var zero T
		t.Fatalf("want one %T, got %+v", zero, acts)
	}
	return v[0]
}

func (r *rig) report(robot int, ep, round uint64, pos int32, applied int32) []Action {
	return r.step(GotReport{Now: r.now, Subject: robot, Msg: turn.Report{Fleet: "yard", Epoch: ep, Round: round,
		Robot: uint32(robot), Position: pos, Applied: applied, Sender: "r"}})
}

func (r *rig) decide(robot int, round uint64, control int32) []Action {
	return r.step(GotDecision{Now: r.now, Subject: robot, Msg: turn.Decision{Fleet: "yard", Epoch: epoch, Round: round,
		Robot: uint32(robot), Control: control, Sender: "r"}})
}

func dropped(t *testing.T, acts []Action, want turn.DropReason) {
	t.Helper()
	for _, d := range of[Drop](acts) {
		if d.Reason == want && d.Detail != "" {
			return
		}
	}
	t.Fatalf("want a %q drop, got %+v", want, acts)
}

// gathered runs the first reports of every robot (at cells 11, 12, ...)
// and returns round 1's start.
func (r *rig) gathered() turn.Start {
	r.t.Helper()
	r.step(Begin{Now: 0})
	r.step(Members{Now: 0, Alive: []int{0, 1, 2}})
	var acts []Action
	for i := range r.c.robots {
		acts = r.report(i, 0, 0, int32(11+i), 0)
	}
	return one[SendStart](r.t, acts).Msg
}

func TestBeginAsksForReports(t *testing.T) {
	r := newRig(t, config(t, 3))
	acts := r.step(Begin{Now: 0})
	if h := one[SendHello](t, acts); h.Msg.Epoch != epoch || h.Msg.Fleet != "yard" {
		t.Fatalf("%+v", h)
	}
	one[Note](t, acts)
	// Asked again every second while nobody reports, forever.
	for s := 1; s <= 30; s++ {
		acts = r.at(time.Duration(s) * time.Second)
		one[SendHello](t, acts)
		if len(of[SendStart](acts)) != 0 {
			t.Fatal("started without any report")
		}
	}
}

func TestAllReportedStartsAtOnce(t *testing.T) {
	r := newRig(t, config(t, 3))
	s := r.gathered()
	if s.Round != 1 || s.Epoch != epoch || !slices.Equal(s.Order, []uint32{0, 1, 2}) || s.Mode != turn.Hybrid ||
		!slices.Equal(s.DeadlinesUs, []uint64{100e3, 200e3, 300e3}) || s.Params.Samples != 2 || s.Digest != "d1" {
		t.Fatalf("%+v", s)
	}
	x := r.m.NewState()
	if err := r.m.Unflatten(x, s.Ints, s.Reals); err != nil {
		t.Fatal(err)
	}
	for i := range 3 {
		if p := r.m.Position(x, i); p != int32(11+i) {
			t.Fatalf("robot %d at %d, reported 11+%d", i, p, i)
		}
	}
	if len(of[Note](r.acts)) != 1 {
		t.Fatalf("no warnings when everyone reported: %+v", of[Note](r.acts))
	}
}

// The restart case: gossip has not re-formed (nobody alive yet), one robot
// answers first. The machine neither starts at the first report nor drops
// the others' re-sent reports (old epoch, old round numbers), and round 1
// has every robot where it said it was.
func TestRestartGathersEveryReport(t *testing.T) {
	r := newRig(t, config(t, 3))
	r.step(Begin{Now: 0})
	r.step(Members{Now: 0, Alive: nil})
	if len(of[SendStart](r.report(1, epoch-5, 62, 21, 3))) != 0 {
		t.Fatal("started at the first report")
	}
	r.now = 300 * time.Millisecond
	r.report(0, epoch-5, 62, 20, 1)
	r.now = 900 * time.Millisecond
	acts := r.report(2, epoch-5, 61, 22, 0)
	if len(of[SendStart](acts)) != 0 {
		t.Fatal("started with no live robot")
	}
	if n := one[Note](t, acts); !n.Warn || !strings.Contains(n.Text, "no live robots") {
		t.Fatalf("%+v", n)
	}
	s := one[SendStart](t, r.step(Members{Now: time.Second, Alive: []int{0, 1, 2}})).Msg
	x := r.m.NewState()
	_ = r.m.Unflatten(x, s.Ints, s.Reals)
	for i := range 3 {
		if p := r.m.Position(x, i); p != int32(20+i) {
			t.Fatalf("robot %d at %d, reported %d", i, p, 20+i)
		}
	}
	if s.Round != 1 {
		t.Fatal(s.Round)
	}
}

// With a robot that never reports, the run starts after GatherWait and
// names it.
func TestGatherWaitNamesMissingRobots(t *testing.T) {
	r := newRig(t, config(t, 3))
	r.step(Begin{Now: 0})
	r.step(Members{Now: 0, Alive: []int{0, 1, 2}})
	r.report(0, 0, 0, 5, 0)
	r.report(2, 0, 0, 7, 0)
	if len(of[SendStart](r.at(2*time.Second))) != 0 {
		t.Fatal("started before the gather wait")
	}
	acts := r.at(3 * time.Second)
	one[SendStart](t, acts)
	n := one[Note](t, acts)
	if !n.Warn || n.Robot != 1 || !strings.Contains(n.Text, "without a report from robot 1") {
		t.Fatalf("%+v", n)
	}
}

func TestRoundSettlesWhenAllDecided(t *testing.T) {
	r := newRig(t, config(t, 3))
	r.gathered()
	r.now = 10 * time.Millisecond
	r.decide(0, 1, 3)
	r.now = 20 * time.Millisecond
	r.decide(2, 1, 1)
	r.now = 35 * time.Millisecond
	acts := r.decide(1, 1, 4)
	cl := one[SendClose](t, acts).Msg
	if !slices.Equal(cl.Controls, []int32{3, 4, 1}) || len(cl.Held) != 0 || cl.LatencyUs != 35000 || cl.Stalled != 0 || cl.Epoch != epoch {
		t.Fatalf("%+v", cl)
	}
	rec := one[Closed](t, acts).Record
	if len(rec.Decisions) != 3 || rec.Decisions[2].AfterUs != 35000 {
		t.Fatalf("%+v", rec)
	}
	// Reports: robot 1 carried out hold instead of its decision.
	r.now = 50 * time.Millisecond
	r.report(0, epoch, 1, 12, 3)
	r.report(1, epoch, 1, 12, 0)
	acts = r.report(2, epoch, 1, 13, 1)
	f := one[Filed](t, acts).Record
	if f.Reports != 3 || len(f.Missing) != 0 || f.Epoch != epoch || f.Round != 1 {
		t.Fatalf("%+v", f)
	}
	s := one[SendStart](t, acts).Msg
	if s.Round != 2 {
		t.Fatal(s.Round)
	}
	x := r.m.NewState()
	_ = r.m.Unflatten(x, s.Ints, s.Reals)
	if r.m.Position(x, 0) != 12 || r.m.Position(x, 1) != 12 || r.m.Position(x, 2) != 13 {
		t.Fatal("round 2 is not built from the reports")
	}
}

// Hybrid: a robot that misses its deadline is held, the round closes once
// every robot decided or is past its own deadline plus the grace for
// repeats (Grace: 50 ms here), and 3 misses in a row are named.
func TestHybridHeldRobot(t *testing.T) {
	r := newRig(t, config(t, 3))
	r.gathered()
	for round := uint64(1); round <= 3; round++ {
		base := r.now
		r.decide(0, round, 0)
		r.decide(2, round, 0)
		if len(of[SendClose](r.at(base+249*time.Millisecond))) != 0 {
			t.Fatal("closed before robot 1's deadline and grace")
		}
		acts := r.at(base + 250*time.Millisecond)
		cl := one[SendClose](t, acts).Msg
		if !slices.Equal(cl.Held, []uint32{1}) || cl.LatencyUs != 250000 || cl.Stalled != 0 {
			t.Fatalf("%+v", cl)
		}
		notes := of[Note](acts)
		if round == 3 && (len(notes) != 1 || notes[0].Robot != 1 || !strings.Contains(notes[0].Text, "3 rounds in a row")) {
			t.Fatalf("%+v", notes)
		}
		// Robot 1's decision after the close is late, not dropped.
		if l := one[Late](t, r.decide(1, round, 0)); l.Robot != 1 || l.Round != round {
			t.Fatalf("%+v", l)
		}
		for i := range 3 {
			r.report(i, epoch, round, 11, 0)
		}
	}
	if r.c.Late() != 3 {
		t.Fatal(r.c.Late())
	}
}

// Sequential: robot 1 never answers. The round closes at the last deadline
// with robot 1 named as the one that stalled it; robot 2, which was only
// waiting, is not blamed.
func TestSequentialStall(t *testing.T) {
	cfg := config(t, 3)
	cfg.Mode = turn.Sequential
	r := newRig(t, cfg)
	r.gathered()
	var notes []Note
	for round := uint64(1); round <= 4; round++ {
		base := r.now
		r.now = base + time.Millisecond
		r.decide(0, round, 1)
		acts := r.at(base + 350*time.Millisecond)
		cl := one[SendClose](t, acts).Msg
		if !slices.Equal(cl.Held, []uint32{1, 2}) || cl.Stalled != 2 || cl.LatencyUs != 350000 {
			t.Fatalf("%+v", cl)
		}
		rec := one[Closed](t, acts).Record
		if rec.Stalled == nil || *rec.Stalled != 1 || rec.LatencyUs != 350000 {
			t.Fatalf("%+v", rec)
		}
		notes = append(notes, of[Note](acts)...)
		for i := range 3 {
			r.report(i, epoch, round, 11, 0)
		}
	}
	if len(notes) != 1 || notes[0].Robot != 1 || !strings.Contains(notes[0].Text, "stalled on robot 1") ||
		!strings.Contains(notes[0].Text, "robots [2] after it were waiting") {
		t.Fatalf("one warning naming the robot that stalled: %+v", notes)
	}
}

func TestBadDecisions(t *testing.T) {
	cfg := config(t, 3)
	r := newRig(t, cfg)
	r.step(Begin{Now: 0})
	r.step(Members{Now: 0, Alive: []int{0, 1}}) // robot 2 is not in the order
	for i := range 3 {
		r.report(i, 0, 0, 11, 0)
	}
	d := func(mutate func(*GotDecision)) GotDecision {
		e := GotDecision{Now: r.now, Subject: 0, Msg: turn.Decision{Fleet: "yard", Epoch: epoch, Round: 1, Robot: 0, Control: 1}}
		mutate(&e)
		return e
	}
	for _, c := range []struct {
		ev   GotDecision
		want turn.DropReason
	}{
		{d(func(e *GotDecision) { e.Msg.Fleet = "x" }), turn.DropForeign},
		{d(func(e *GotDecision) { e.Msg.Heard = make([]uint32, turn.MaxRobots+1) }), turn.DropBounds},
		{d(func(e *GotDecision) { e.Msg.Robot, e.Subject = 3, 3 }), turn.DropRange},
		{d(func(e *GotDecision) { e.Subject = 1 }), turn.DropSubject},
		{d(func(e *GotDecision) { e.Msg.Round = 0 }), turn.DropMalformed},
		{d(func(e *GotDecision) { e.Msg.Epoch = epoch - 1 }), turn.DropStale},
		{d(func(e *GotDecision) { e.Msg.Epoch = epoch + 1 }), turn.DropFuture},
		{d(func(e *GotDecision) { e.Msg.Round = 2 }), turn.DropFuture},
		{d(func(e *GotDecision) { e.Msg.Robot, e.Subject = 2, 2 }), turn.DropNotInOrder},
		{d(func(e *GotDecision) { e.Msg.Control = 5 }), turn.DropRange},
		{d(func(e *GotDecision) { e.Msg.Control = -99 }), turn.DropRange},
		{d(func(e *GotDecision) { e.Msg.Guessed = []uint32{7} }), turn.DropRange},
	} {
		dropped(t, r.step(c.ev), c.want)
	}
	r.step(d(func(*GotDecision) {}))
	// The same decision again is a repeat: robots repeat until the close.
	if acts := r.step(d(func(*GotDecision) {})); len(acts) != 0 || r.c.Repeats() != 1 {
		t.Fatalf("repeat: %v", acts)
	}
	r.decide(1, 1, 0)
	r.report(0, epoch, 1, 11, 0)
	r.report(1, epoch, 1, 11, 0) // round 2 starts
	if acts := r.decide(0, 1, 0); len(acts) != 0 || r.c.Repeats() != 2 {
		t.Fatalf("a repeat of the last round's decision: %v", acts)
	}
}

func TestBadReports(t *testing.T) {
	r := newRig(t, config(t, 3))
	r.gathered()
	rep := func(mutate func(*GotReport)) GotReport {
		e := GotReport{Now: r.now, Subject: 2, Msg: turn.Report{Fleet: "yard", Epoch: epoch, Round: 1, Robot: 2, Position: 3}}
		mutate(&e)
		return e
	}
	for _, c := range []struct {
		ev   GotReport
		want turn.DropReason
	}{
		{rep(func(e *GotReport) { e.Msg.Fleet = "x" }), turn.DropForeign},
		{rep(func(e *GotReport) { e.Msg.Seen = make([]model.Sighting, turn.MaxSightings+1) }), turn.DropBounds},
		{rep(func(e *GotReport) { e.Msg.Robot, e.Subject = 3, 3 }), turn.DropRange},
		{rep(func(e *GotReport) { e.Subject = 0 }), turn.DropSubject},
		{rep(func(e *GotReport) { e.Msg.Applied = 5 }), turn.DropRange},
		{rep(func(e *GotReport) { e.Msg.Epoch = epoch + 1 }), turn.DropFuture},
		{rep(func(e *GotReport) { e.Msg.Round = 2 }), turn.DropFuture},
		{rep(func(e *GotReport) { e.Msg.Position = 1000 }), turn.DropMalformed},
		{rep(func(e *GotReport) { e.Msg.Seen = []model.Sighting{{What: 50, Value: 1}} }), turn.DropMalformed},
	} {
		dropped(t, r.step(c.ev), c.want)
	}
	r.step(rep(func(*GotReport) {}))
	if acts := r.step(rep(func(*GotReport) {})); len(acts) != 0 {
		t.Fatalf("a repeated report: %v", acts)
	}
	dropped(t, r.step(rep(func(e *GotReport) { e.Msg.Position = 4 })), turn.DropDuplicate)
	// Reports close the round only once it settles, and the missing ones
	// wait ReportWait.
	r.decide(0, 1, 0)
	r.decide(1, 1, 0)
	r.decide(2, 1, 0)
	base := r.now
	if len(of[Filed](r.at(base+time.Second))) != 0 {
		t.Fatal("filed before the report wait")
	}
	acts := r.at(base + 2*time.Second)
	if f := one[Filed](t, acts).Record; !slices.Equal(f.Missing, []int{0, 1}) || f.Reports != 1 {
		t.Fatalf("%+v", f)
	}
	// Robot 0's report comes late: where it is, taken at the next filing;
	// copies of it and of robot 2's filed one are repeats.
	if acts := r.report(0, epoch, 1, 3, 0); len(acts) != 0 || r.c.positions[0] == nil {
		t.Fatalf("a late report: %v", acts)
	}
	if acts := r.report(2, epoch, 1, 3, 0); len(acts) != 0 || r.c.positions[2] != nil {
		t.Fatalf("a repeat of a filed report: %v", acts)
	}
}

// A robot that comes back mid-run says where it is (round 0, or its old
// run's numbers); that is taken at the next filing.
func TestPositionReportsMidRun(t *testing.T) {
	r := newRig(t, config(t, 3))
	r.gathered()
	r.report(2, epoch-3, 17, 40, 0)
	for i := range 3 {
		r.decide(i, 1, 0)
	}
	r.report(0, epoch, 1, 11, 0)
	acts := r.report(1, epoch, 1, 12, 0)
	if len(of[SendStart](acts)) != 0 {
		t.Fatal("robot 2's position report is not its round report")
	}
	s := one[SendStart](t, r.at(r.now+2*time.Second)).Msg
	x := r.m.NewState()
	_ = r.m.Unflatten(x, s.Ints, s.Reals)
	if r.m.Position(x, 2) != 40 {
		t.Fatalf("robot 2 at %d", r.m.Position(x, 2))
	}
}

func TestPeriodRoundsModelAndFinish(t *testing.T) {
	cfg := config(t, 2)
	cfg.Period, cfg.Rounds = time.Second, 2
	r := newRig(t, cfg)
	r.step(Begin{Now: 0})
	r.step(Members{Now: 0, Alive: []int{0, 1}})
	r.report(0, 0, 0, 1, 0)
	r.report(1, 0, 0, 2, 0)
	r.step(SetModel{Now: 0, Version: 4})
	r.decide(0, 1, 0)
	r.decide(1, 1, 0)
	r.report(0, epoch, 1, 1, 0)
	acts := r.report(1, epoch, 1, 1, 0)
	if len(of[SendStart](acts)) != 0 || one[Arm](t, acts).At != time.Second {
		t.Fatalf("round 2 waits for the period: %+v", acts)
	}
	s := one[SendStart](t, r.at(time.Second)).Msg
	if s.Round != 2 || s.ModelVersion != 4 {
		t.Fatalf("%+v", s)
	}
	r.decide(0, 2, 0)
	r.decide(1, 2, 0)
	r.report(0, epoch, 2, 1, 0)
	acts = r.report(1, epoch, 2, 1, 0)
	one[Finished](t, acts)
	if len(r.at(5*time.Second)) != 0 {
		t.Fatal("acted after finishing")
	}
}

func TestStopFilesTheRoundInPlay(t *testing.T) {
	r := newRig(t, config(t, 3))
	r.gathered()
	r.now = 5 * time.Millisecond
	r.decide(0, 1, 2)
	f := one[Filed](t, r.step(Stop{Now: 7 * time.Millisecond})).Record
	if !f.Interrupted || f.Round != 1 || f.Controls[0] != 2 || f.LatencyUs != 7000 {
		t.Fatalf("%+v", f)
	}
}

func TestMembershipChangesOrder(t *testing.T) {
	r := newRig(t, config(t, 3))
	r.gathered()
	for i := range 3 {
		r.decide(i, 1, 0)
	}
	r.step(Members{Now: r.now, Alive: []int{0, 2, 7, -1}})
	r.report(0, epoch, 1, 1, 0)
	r.report(1, epoch, 1, 1, 0)
	acts := r.report(2, epoch, 1, 1, 0)
	s := one[SendStart](t, acts).Msg
	if !slices.Equal(s.Order, []uint32{0, 2}) || !slices.Equal(s.DeadlinesUs, []uint64{100e3, 200e3}) {
		t.Fatalf("%+v", s)
	}
	if n := one[Note](t, acts); n.Robot != 1 || !strings.Contains(n.Text, "left the order") {
		t.Fatalf("%+v", n)
	}
}

// --mode auto is hybrid with the switch; Args passes it on as such.
func TestModeAutoFlag(t *testing.T) {
	c := config(t, 3)
	fs := flag.NewFlagSet("", flag.ContinueOnError)
	fs.SetOutput(io.Discard)
	c.RegisterFlags(fs)
	if err := fs.Parse([]string{"--mode", "auto", "--period", "1s"}); err != nil {
		t.Fatal(err)
	}
	if c.Mode != turn.Hybrid || !c.AutoParallel || ModeName(c) != "auto" || c.Validate() != nil {
		t.Fatalf("%v %v %q %v", c.Mode, c.AutoParallel, ModeName(c), c.Validate())
	}
	if !slices.Contains(c.Args(), "--mode=auto") {
		t.Fatalf("args %v", c.Args())
	}
	if err := fs.Parse([]string{"--mode", "parallel"}); err != nil || c.AutoParallel {
		t.Fatalf("parallel after auto: %v %v", err, c.AutoParallel)
	}
	if err := fs.Parse([]string{"--mode", "sometimes"}); err == nil || !strings.Contains(err.Error(), "auto") {
		t.Fatalf("bad mode: %v", err)
	}
}

// With --mode auto a round goes parallel while hops cannot fit a
// sequential round in the period, and back to hybrid once they can.
func TestAutoSwitchesBack(t *testing.T) {
	cfg := config(t, 3)
	cfg.AutoParallel, cfg.Period = true, 30*time.Millisecond
	r := newRig(t, cfg)
	r.gathered()
	var modes []turn.Mode
	for round := uint64(1); round <= 40; round++ {
		hop := uint64(2000)
		if round >= 5 && round < 15 {
			hop = 20000 // 3 x 20 ms > 30 ms
		}
		for i := range 3 {
			r.step(GotDecision{Now: r.now, Subject: i, Msg: turn.Decision{Fleet: "yard", Epoch: epoch, Round: round, Robot: uint32(i), HopUs: hop}})
		}
		for i := range 3 {
			r.report(i, epoch, round, 1, 0)
		}
		acts := r.at(r.now + time.Second)
		if round == 40 {
			break
		}
		modes = append(modes, one[SendStart](t, acts).Msg.Mode)
	}
	// modes[k] is round k+2's mode, chosen after round k+1's decisions:
	// round 5's slow hops make round 6 parallel; the monitor's window of
	// four rounds brings hybrid back within six rounds of recovery.
	if modes[3] != turn.Hybrid || modes[4] != turn.Parallel {
		t.Fatalf("switch: %v", modes)
	}
	back := slices.Index(modes[5:], turn.Hybrid) + 5 + 2
	if back < 16 || back > 21 {
		t.Fatalf("hybrid again from round %d after recovery at round 15: %v", back, modes)
	}
}

func TestAutoParallel(t *testing.T) {
	cfg := config(t, 3)
	cfg.AutoParallel, cfg.Period = true, 10*time.Millisecond
	r := newRig(t, cfg)
	r.gathered()
	for i := range 3 {
		r.step(GotDecision{Now: r.now, Subject: i, Msg: turn.Decision{Fleet: "yard", Epoch: epoch, Round: 1, Robot: uint32(i), HopUs: 20000}})
	}
	for i := range 3 {
		r.report(i, epoch, 1, 1, 0)
	}
	s := one[SendStart](t, r.at(time.Second)).Msg
	if s.Mode != turn.Parallel {
		t.Fatalf("20 ms hops cannot fit 3 turns in 10 ms: %v", s.Mode)
	}
}

func TestConfigValidate(t *testing.T) {
	for _, c := range []struct {
		mutate func(*Config)
		flag   string
	}{
		{func(c *Config) { c.Decide.Samples = 0 }, "--samples 0"},
		{func(c *Config) { c.Decide.Samples = 1 << 30 }, "--samples"},
		{func(c *Config) { c.Decide.Horizon = -1 }, "--horizon -1"},
		{func(c *Config) { c.Mode = 0 }, "--mode"},
		{func(c *Config) { c.AutoParallel = true }, "--mode auto needs a --period"},
		{func(c *Config) { c.AutoParallel, c.Period, c.Mode = true, time.Second, turn.Parallel }, "--mode auto runs hybrid"},
		{func(c *Config) { c.Guess = "psychic" }, "--guess"},
		{func(c *Config) { c.TurnBudget = 0 }, "--turn-deadline"},
		{func(c *Config) { c.TurnBudget = time.Hour }, "--turn-deadline"},
		{func(c *Config) { c.Period = -1 }, "--period"},
		{func(c *Config) { c.Rounds = -1 }, "--rounds"},
		{func(c *Config) { c.ReportWait = 0 }, "--report-wait"},
		{func(c *Config) { c.GatherWait = -1 }, "--first-report-wait"},
		{func(c *Config) { c.Order = Order{0, 0} }, "--order"},
		{func(c *Config) { c.Order = Order{5} }, "--order"},
		{func(c *Config) { c.Order = Order{0, 1} }, "--order 0,1: lists 2 of the 3 robots"},
	} {
		cfg := config(t, 3)
		c.mutate(&cfg)
		if err := cfg.Validate(); err == nil || !strings.HasPrefix(err.Error(), c.flag) {
			t.Errorf("want an error starting %q, got %v", c.flag, err)
		}
	}
	// Flags are built from the config and parse back to it.
	cfg := DefaultConfig()
	fs := flag.NewFlagSet("x", flag.ContinueOnError)
	fs.SetOutput(io.Discard)
	cfg.RegisterFlags(fs)
	if err := fs.Parse([]string{"--mode", "sequential", "--order", "2,0,1", "--samples", "3"}); err != nil {
		t.Fatal(err)
	}
	if cfg.Mode != turn.Sequential || !slices.Equal(cfg.Order, Order{2, 0, 1}) || cfg.Decide.Samples != 3 || cfg.Decide.Horizon != 20 {
		t.Fatalf("%+v", cfg)
	}
	if err := fs.Parse([]string{"--mode", "fast"}); err == nil {
		t.Fatal("bad mode accepted")
	}
}

// Two different decisions for one robot: neither is used, the robot holds;
// the close never carries a control the robot did not send.
func TestConflictingDecisions(t *testing.T) {
	r := newRig(t, config(t, 3))
	r.gathered()
	r.decide(0, 1, 3)
	dropped(t, r.decide(0, 1, 1), turn.DropDuplicate)
	dropped(t, r.decide(0, 1, 3), turn.DropDuplicate)
	r.decide(1, 1, 0)
	acts := r.decide(2, 1, 0)
	if len(of[SendClose](acts)) != 0 {
		t.Fatal("closed before robot 0's deadline though its decisions conflict")
	}
	cl := one[SendClose](t, r.at(150*time.Millisecond)).Msg
	if !slices.Equal(cl.Held, []uint32{0}) || cl.Controls[0] != 0 {
		t.Fatalf("%+v", cl)
	}
}

// Robots following a newer run than this coordinator's: said once.
func TestNewerRunWarned(t *testing.T) {
	r := newRig(t, config(t, 3))
	r.gathered()
	for range 3 {
		acts := r.step(GotReport{Now: r.now, Subject: 1, Msg: turn.Report{Fleet: "yard", Epoch: epoch + 9, Round: 1, Robot: 1}})
		dropped(t, acts, turn.DropFuture)
	}
	notes := of[Note](r.acts)
	n := 0
	for _, x := range notes {
		if strings.Contains(x.Text, "another coordinator running") {
			n++
		}
	}
	if n != 1 {
		t.Fatalf("%d warnings: %+v", n, notes)
	}
}

// Lossy links: the coordinator repeats a round's start while turns are
// missing and its close while reports are missing, at most MaxRepeats
// copies each; driven only by the ticks it asks for, it still closes and
// files the round once the copies run out.
func TestRepeatsThenDeadlines(t *testing.T) {
	cfg := config(t, 3)
	cfg.TurnBudget = 8 * time.Millisecond // a copy every 2 ms
	r := newRig(t, cfg)
	r.gathered()
	r.decide(0, 1, 0) // robot 2 never decides; nobody reports
	r.decide(1, 1, 0)
	var starts, closes int
	var filed bool
	next := r.now
	for range 10000 {
		acts := r.at(next)
		if len(of[Filed](acts)) > 0 {
			filed = true
			break
		}
		for _, s := range of[SendStart](acts) {
			if !s.Repeat || s.Msg.AgeUs == 0 || s.Msg.Round != 1 {
				t.Fatalf("copy %+v at %v", s, r.now)
			}
			starts++
		}
		for _, c := range of[SendClose](acts) {
			if c.Repeat {
				closes++
			}
		}
		arms := of[Arm](r.acts)
		if len(arms) == 0 || arms[len(arms)-1].At <= r.now {
			t.Fatalf("no tick asked for after %v (%d start copies, %d close copies)", r.now, starts, closes)
		}
		next = arms[len(arms)-1].At
	}
	if !filed || starts == 0 || starts > turn.MaxRepeats || closes == 0 || closes > turn.MaxRepeats {
		t.Fatalf("filed %v after %d start and %d close copies", filed, starts, closes)
	}
}

// A robot whose decision never came (cut off, say) is not waited for after
// the close: the robots that decided report, and the round is filed.
func TestHeldRobotNotWaitedFor(t *testing.T) {
	r := newRig(t, config(t, 3))
	r.gathered()
	r.decide(0, 1, 0)
	r.decide(2, 1, 0)
	one[SendClose](t, r.at(r.now+250*time.Millisecond))
	r.report(0, epoch, 1, 11, 0)
	acts := r.report(2, epoch, 1, 13, 0)
	if f := one[Filed](t, acts).Record; !slices.Equal(f.Missing, []int{1}) || !slices.Equal(f.Held, []int{1}) {
		t.Fatalf("%+v", f)
	}
}

// A run resumed from the durable log (Resume: the last round an earlier run
// closed) numbers its rounds on from there, finishes at Rounds as a fresh
// run would, and has nothing to play when the log already holds them all.
func TestResumeContinuesNumbering(t *testing.T) {
	cfg := config(t, 3)
	cfg.Resume, cfg.Rounds = 41, 42
	r := newRig(t, cfg)
	r.step(Begin{Now: 0})
	r.step(Members{Now: 0, Alive: []int{0, 1, 2}})
	var acts []Action
	for i := range 3 {
		// The robots re-send their reports of the old run's round 41.
		acts = r.report(i, epoch-5, 41, int32(30+i), 0)
	}
	s := one[SendStart](t, acts).Msg
	if s.Round != 42 || s.Epoch != epoch {
		t.Fatalf("resumed run starts round %d of %d, want 42", s.Round, s.Epoch)
	}
	for i := range 3 {
		r.decide(i, 42, 0)
	}
	for i := range 3 {
		acts = r.report(i, epoch, 42, int32(30+i), 0)
	}
	if f := one[Filed](t, acts).Record; f.Round != 42 || f.Epoch != epoch {
		t.Fatalf("%+v", f)
	}
	one[Finished](t, acts)

	cfg.Resume = 42
	done := newRig(t, cfg)
	acts = done.step(Begin{Now: 0})
	one[Finished](t, acts)
	if len(of[SendStart](done.at(10*time.Second))) != 0 {
		t.Fatal("a run with every round in the log started one")
	}
}

// A resumed run waits for the robots' reports of the last round the old run
// closed (they may have carried it out after the old coordinator died): a
// re-sent report of an earlier round does not start it, and does not
// replace a newer one. With only old reports, it starts after the wait and
// names the robot.
func TestResumeWaitsForTheLastRoundsReports(t *testing.T) {
	cfg := config(t, 3)
	cfg.Resume = 41
	r := newRig(t, cfg)
	r.step(Begin{Now: 0})
	r.step(Members{Now: 0, Alive: []int{0, 1, 2}})
	for i := range 3 {
		if len(of[SendStart](r.report(i, epoch-5, 40, int32(20+i), 0))) != 0 {
			t.Fatal("started on reports from before the last closed round")
		}
	}
	var acts []Action
	for i := range 3 {
		acts = r.report(i, epoch-5, 41, int32(30+i), 0)
		if i == 0 {
			r.report(0, epoch-5, 40, 20, 0) // a late re-send of the older one
		}
	}
	s := one[SendStart](t, acts).Msg
	x := r.m.NewState()
	_ = r.m.Unflatten(x, s.Ints, s.Reals)
	for i := range 3 {
		if p := r.m.Position(x, i); p != int32(30+i) {
			t.Fatalf("robot %d at %d, its report of round 41 says %d", i, p, 30+i)
		}
	}
	if len(of[Note](acts)) != 0 {
		t.Fatalf("warned with every report current: %+v", of[Note](acts))
	}

	r = newRig(t, cfg)
	r.step(Begin{Now: 0})
	r.step(Members{Now: 0, Alive: []int{0, 1, 2}})
	r.report(0, epoch-5, 41, 30, 0)
	r.report(1, epoch-5, 41, 31, 0)
	r.report(2, epoch-5, 40, 22, 0)
	acts = r.at(cfg.GatherWait)
	one[SendStart](t, acts)
	if n := one[Note](t, acts); !n.Warn || n.Robot != 2 || !strings.Contains(n.Text, "report of round 40") {
		t.Fatalf("%+v", n)
	}
}

// A close the shell held back (the durable log was slow) gives the robots
// the whole report wait from when it went out.
func TestCloseSentRestartsTheReportWait(t *testing.T) {
	cfg := config(t, 2)
	cfg.ConfirmCloses = true
	r := newRig(t, cfg)
	r.step(Begin{Now: 0})
	r.step(Members{Now: 0, Alive: []int{0, 1}})
	r.report(0, 0, 0, 1, 0)
	r.report(1, 0, 0, 2, 0)
	r.decide(0, 1, 0)
	one[SendClose](t, r.decide(1, 1, 0))
	wait := r.c.cfg.ReportWait
	if len(of[Filed](r.at(wait+time.Second))) != 0 {
		t.Fatal("filed before the close went out")
	}
	sent := wait + time.Second
	r.step(CloseSent{Now: sent, Round: 1})
	if len(of[Filed](r.at(sent+wait-time.Millisecond))) != 0 {
		t.Fatal("filed before the report wait counted from the close's publication")
	}
	one[Filed](t, r.at(sent+wait))
}
