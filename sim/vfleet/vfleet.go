// Package vfleet runs a whole fleet in one process in virtual time: m
// robot machines (agentd/turn) and the coordinator's machine
// (coordinator/clock) exchange their real wire messages (proto/wire) over
// an in-memory bus with a latency and loss model, robots compute real
// rollout turns and guesses, and the simulator's world (sim/world) plays
// the robots' software. Nothing sleeps: a discrete-event queue ordered by
// virtual time (ties by insertion, or seeded at random with Shuffle) drives
// everything, so a run with the same seeds replays exactly.
//
// With no loss and delays inside the deadlines, it decides bit for bit what
// the real-process fleet (`sim fleet`) decides for the same seed: the
// machines, the wire and the rollout are the same code.
package vfleet

import (
	"container/heap"
	"errors"
	"fmt"
	"math/rand/v2"
	"time"

	"baton/agentd/decide"
	"baton/agentd/turn"
	"baton/coordinator/clock"
	"baton/proto/wire"
	"baton/signal"
	"baton/sim/fault"
	"baton/sim/fleetsum"
	"baton/sim/model"
	"baton/sim/world"
)

// Link is the in-memory bus's model of every delivery (publisher to one
// subscriber): Hop plus a uniform draw from [0, Jitter), lost with
// probability Loss.
type Link struct {
	Hop    time.Duration
	Jitter time.Duration
	Loss   float64
	Seed   uint64
	// Shuffle breaks ties between events due at the same time at random
	// (seeded) instead of by insertion.
	Shuffle bool
}

// Config of a virtual fleet.
type Config struct {
	// Clock is the coordinator's configuration; Clock.Model must be a
	// model.Fleet. Clock.Rounds is ignored: Run says how many.
	Clock clock.Config
	// Robots' side: the stale limit, fallback guess source and options
	// (agentd's --stale, --guess, the classifier), and recompute's margin.
	Stale       time.Duration
	Guess       string
	Guesses     signal.Options
	GuessMargin time.Duration
	// World is the episode seed the world starts from (sim/episode).
	World uint64
	Link  Link
	// TurnTime is the virtual time one rollout turn takes.
	TurnTime time.Duration
	// Slow holds back robot r's decision publishes by Slow[r].
	Slow map[int]time.Duration
	// Wait is how long a robot's software waits for a round's close
	// before holding (0: (m+2) turn budgets + 10 s, as sim fleet waits).
	Wait time.Duration
	// OnFiled, when set, gets every round's decision-log record (as the
	// coordinator files it), for replays.
	OnFiled func(clock.Record)
	// Faults are the drill's message faults (sim/fault), seeded with
	// FaultSeed, applied to every delivery after Link; Slow faults add to
	// the robots' turn times. Process faults are refused: they need real
	// processes.
	Faults    []fault.Spec
	FaultSeed uint64
}

// Fleet is one virtual fleet run.
type Fleet struct {
	cfg     Config
	filed   uint64 // the last round the coordinator filed
	m       model.Fleet
	robots  []*robot
	coord   *clock.Machine
	world   *world.World
	sources *signal.Sources
	decider decide.Reusing

	q    queue
	now  time.Duration
	seq  uint64
	link *rand.Rand
	// The fault layer, and a second one drawing the hops robots measure
	// (apart, so measuring does not shift the messages' draws).
	faults, probe *fault.Layer
	late          uint64
	modes         map[uint64]string // round -> mode, from the coordinator's closes

	// The robots' software: waiting for round round's closes.
	round   int
	answers []*turn.View

	results []fleetsum.Round
	target  int // Run stops filing rounds here
	started time.Duration
	onRound func(fleetsum.Round)
	compute time.Duration // wall time in rollout and guesses
	events  int
}

type robot struct {
	id int
	m  *turn.Machine
}

// New builds the fleet at virtual time 0; nothing runs until Run.
func New(cfg Config) (*Fleet, error) {
	fm := cfg.Clock.Model
	if fm == nil {
		return nil, errors.New("vfleet: no scenario model")
	}
	cfg.Clock.Rounds = 0
	if err := cfg.Clock.Validate(); err != nil {
		return nil, err
	}
	if cfg.Guess == "" {
		cfg.Guess = "base"
	}
	src, err := signal.NewSources(fm, cfg.Guess, cfg.Guesses)
	if err != nil {
		return nil, fmt.Errorf("--guess: %w", err)
	}
	if cfg.Link.Loss < 0 || cfg.Link.Loss > 1 || cfg.Link.Hop < 0 || cfg.Link.Jitter < 0 || cfg.TurnTime < 0 {
		return nil, fmt.Errorf("vfleet: link %+v, turn time %s: want delays >= 0 and a loss in [0,1]", cfg.Link, cfg.TurnTime)
	}
	m := fm.Robots()
	if cfg.Wait <= 0 {
		cfg.Wait = time.Duration(m+2)*cfg.Clock.TurnBudget + 10*time.Second
	}
	if cfg.Stale <= 0 {
		cfg.Stale = 10 * time.Second
	}
	for i, s := range cfg.Faults {
		if s.Kind.Process() {
			return nil, fmt.Errorf("fault %d (%s): needs real processes, not the virtual fleet", i+1, s.Kind)
		}
		if err := s.Check(m, 0); err != nil {
			return nil, fmt.Errorf("fault %d: %w", i+1, err)
		}
	}
	f := &Fleet{cfg: cfg, m: fm, coord: clock.New(cfg.Clock), world: world.New(fm, cfg.World), sources: src, decider: decide.Reusing{M: fm},
		link: rand.New(rand.NewPCG(cfg.Link.Seed, 0x6c696e6b)), modes: map[uint64]string{}}
	if len(cfg.Faults) > 0 {
		f.faults = fault.New(cfg.FaultSeed, cfg.Faults)
		f.probe = fault.New(cfg.FaultSeed^0x70726f6265, cfg.Faults)
	}
	for r := range m {
		f.robots = append(f.robots, &robot{id: r, m: turn.New(turn.Config{Fleet: cfg.Clock.Fleet, Robot: r, Model: fm,
			Digest: cfg.Clock.Digest, Sender: fmt.Sprintf("robot-%d", r), Stale: cfg.Stale})})
	}
	return f, nil
}

// World is the simulated world (its cost and batches so far).
func (f *Fleet) World() *world.World { return f.world }

// Now is the virtual time.
func (f *Fleet) Now() time.Duration { return f.now }

// ComputeTime is the wall time spent in rollout turns and guesses so far.
func (f *Fleet) ComputeTime() time.Duration { return f.compute }

// Events is how many events have been delivered so far.
func (f *Fleet) Events() int { return f.events }

// Machine is robot r's machine (for counters and views).
func (f *Fleet) Machine(r int) *turn.Machine { return f.robots[r].m }

// Coordinator is the coordinator's machine.
func (f *Fleet) Coordinator() *clock.Machine { return f.coord }

// FaultStats is what the fault layer did (zero without faults).
func (f *Fleet) FaultStats() fault.Stats {
	if f.faults == nil {
		return fault.Stats{}
	}
	return f.faults.Stats()
}

// GuessPaths is how the checked source made its guesses (zero when the
// fleet never used it).
func (f *Fleet) GuessPaths() signal.Paths {
	src, why := f.sources.Get("checked")
	if ch, ok := src.(*signal.Checked); ok && why == "" {
		return ch.Paths()
	}
	return signal.Paths{}
}

// Late counts valid decisions that came too late: after the receiving
// robot's own turn, or after the coordinator closed the round.
func (f *Fleet) Late() uint64 { return f.late + f.coord.Late() }

// Run plays rounds rounds (the world carries out each as the robots'
// software saw it), calling onRound after each; it returns the rounds.
func (f *Fleet) Run(rounds int, onRound func(fleetsum.Round)) ([]fleetsum.Round, error) {
	if rounds < 1 {
		return nil, fmt.Errorf("--rounds %d: want at least 1", rounds)
	}
	f.onRound = onRound
	if f.round == 0 {
		f.begin()
	}
	target := len(f.results) + rounds
	f.target = target
	for _, r := range f.robots {
		f.software(r) // answers that waited for the previous Run's end
	}
	// Every round ends within a bounded virtual time; past this the fleet
	// is stuck (everything lost, say), not slow.
	c := f.cfg.Clock
	limit := f.now + time.Duration(rounds+1)*(f.cfg.Wait+c.ReportWait+c.Period+c.GatherWait) + time.Minute
	for len(f.results) < target {
		if len(f.q) == 0 {
			return f.results, fmt.Errorf("the virtual fleet stalled at %s after %d rounds: nothing left to happen", f.now, len(f.results))
		}
		it := heap.Pop(&f.q).(item)
		if it.at > limit {
			return f.results, fmt.Errorf("the virtual fleet made no progress by %s (round %d): every message lost?", limit, f.round)
		}
		f.now = it.at
		f.events++
		it.do()
	}
	return f.results, nil
}

// Finish lets the coordinator file the rounds played (their reports are
// still on the way when Run returns), within a report wait of virtual
// time, so OnFiled has seen every round. The fleet is not run further.
func (f *Fleet) Finish() {
	limit := f.now + 2*f.cfg.Clock.ReportWait + time.Second
	for f.filed < uint64(len(f.results)) && len(f.q) > 0 {
		it := heap.Pop(&f.q).(item)
		if it.at > limit {
			return
		}
		f.now = it.at
		it.do()
	}
}

// begin starts the coordinator and posts every robot's first report.
func (f *Fleet) begin() {
	f.coordStep(clock.Begin{Now: f.now})
	alive := make([]int, len(f.robots))
	for i := range alive {
		alive[i] = i
	}
	f.coordStep(clock.Members{Now: f.now, Alive: alive})
	f.round = 1
	f.answers = make([]*turn.View, len(f.robots))
	f.at(f.now+f.cfg.Wait, f.softDeadline(0))
	for _, r := range f.robots {
		f.observe(r, 0, 0)
	}
}

// ---- the queue ----

type item struct {
	at  time.Duration
	key uint64
	do  func()
}

type queue []item

func (q queue) Len() int { return len(q) }
func (q queue) Less(i, j int) bool {
	if q[i].at != q[j].at {
		return q[i].at < q[j].at
	}
	return q[i].key < q[j].key
}
func (q queue) Swap(i, j int) { q[i], q[j] = q[j], q[i] }
func (q *queue) Push(x any)   { *q = append(*q, x.(item)) }
func (q *queue) Pop() any {
	old := *q
	it := old[len(old)-1]
	*q = old[:len(old)-1]
	return it
}

func (f *Fleet) at(t time.Duration, do func()) {
	f.seq++
	key := f.seq
	if f.cfg.Link.Shuffle {
		key = f.link.Uint64()
	}
	heap.Push(&f.q, item{at: max(t, f.now), key: key, do: do})
}

// deliver schedules one delivery from endpoint from to endpoint to
// (robots 0..m-1, fault.Coordinator) over the link model, then the fault
// layer.
func (f *Fleet) deliver(from, to int, do func()) {
	if f.cfg.Link.Loss > 0 && f.link.Float64() < f.cfg.Link.Loss {
		return
	}
	d := f.cfg.Link.Hop
	if f.cfg.Link.Jitter > 0 {
		d += time.Duration(f.link.Int64N(int64(f.cfg.Link.Jitter)))
	}
	if f.faults == nil {
		f.at(f.now+d, do)
		return
	}
	v := f.faults.Deliver(f.faultRound(), from, to)
	for c := range v.Copies {
		f.at(f.now+d+v.After[c], do)
	}
}

// faultRound is the round the fault schedule goes by: the coordinator's.
func (f *Fleet) faultRound() int { return int(f.coord.Round()) }

// hop is the one-way hop robot r measures to the bus now.
func (f *Fleet) hop(r int) time.Duration {
	d := f.cfg.Link.Hop + f.cfg.Link.Jitter/2
	if f.probe != nil {
		v := f.probe.Deliver(f.faultRound(), r, fault.Coordinator)
		d += v.After[0]
	}
	return d
}

// ---- the coordinator ----

func (f *Fleet) coordStep(ev clock.Event) {
	for _, a := range f.coord.Step(ev) {
		switch a := a.(type) {
		case clock.SendStart:
			data, _ := wire.EncodeStart(a.Msg)
			f.toRobots(fault.Coordinator, func(r *robot) { f.robotReceive(r, 's', data, -1) })
		case clock.SendClose:
			data, _ := wire.EncodeClose(a.Msg)
			f.toRobots(fault.Coordinator, func(r *robot) { f.robotReceive(r, 'c', data, -1) })
		case clock.SendHello:
			data, _ := wire.EncodeHello(a.Msg)
			f.toRobots(fault.Coordinator, func(r *robot) { f.robotReceive(r, 'h', data, -1) })
		case clock.Arm:
			f.at(a.At, func() { f.coordStep(clock.Tick{Now: f.now}) })
		case clock.Closed:
			f.modes[a.Record.Round] = a.Record.Mode
		case clock.Filed:
			f.filed = max(f.filed, a.Record.Round)
			if f.cfg.OnFiled != nil {
				f.cfg.OnFiled(a.Record)
			}
		case clock.Late:
			// counted by the coordinator's machine
		}
	}
}

// toRobots delivers from endpoint from to every robot but itself.
func (f *Fleet) toRobots(from int, do func(*robot)) {
	for _, r := range f.robots {
		if r.id != from {
			f.deliver(from, r.id, func() { do(r) })
		}
	}
}

// ---- robots ----

// robotReceive decodes a delivery, as the daemon's shell does, and steps
// the robot's machine.
func (f *Fleet) robotReceive(r *robot, kind byte, data []byte, subject int) {
	var ev turn.Event
	switch kind {
	case 's':
		m, err := wire.Start(data)
		if err != nil {
			return
		}
		ev = turn.GotStart{Now: f.now, Msg: m}
	case 'c':
		m, err := wire.Close(data)
		if err != nil {
			return
		}
		ev = turn.GotClose{Now: f.now, Msg: m}
	case 'h':
		m, err := wire.Hello(data)
		if err != nil {
			return
		}
		ev = turn.GotHello{Now: f.now, Msg: m}
	case 'd':
		m, err := wire.Decision(data)
		if err != nil {
			return
		}
		ev = turn.GotDecision{Now: f.now, Subject: subject, Msg: m}
	}
	f.robotStep(r, ev)
}

func (f *Fleet) robotStep(r *robot, ev turn.Event) {
	f.robotApply(r, r.m.Step(ev))
	f.software(r)
}

func (f *Fleet) robotApply(r *robot, acts []turn.Action) {
	for _, a := range acts {
		switch a := a.(type) {
		case turn.Arm:
			ev := turn.Timer{Epoch: a.Epoch, Round: a.Round, Kind: a.Kind}
			f.at(a.At, func() { ev.Now = f.now; f.robotStep(r, ev) })
		case turn.Compute:
			f.computeTurn(r, a)
		case turn.Publish:
			a.Decision.HopUs = uint64(f.hop(r.id) / time.Microsecond)
			data, _ := wire.EncodeDecision(a.Decision)
			send := func() {
				f.toRobots(r.id, func(to *robot) { f.robotReceive(to, 'd', data, r.id) })
				f.deliver(r.id, fault.Coordinator, func() {
					d, err := wire.Decision(data)
					if err == nil {
						f.coordStep(clock.GotDecision{Now: f.now, Subject: r.id, Msg: d})
					}
				})
			}
			if d := f.cfg.Slow[r.id]; d > 0 {
				f.at(f.now+d, send)
			} else {
				send()
			}
		case turn.SendReport:
			f.sendReport(r, a.Report)
		case turn.Late:
			f.late++
		}
	}
}

func (f *Fleet) sendReport(r *robot, rep turn.Report) {
	data, err := wire.EncodeReport(rep)
	if err != nil {
		return
	}
	f.deliver(r.id, fault.Coordinator, func() {
		o, err := wire.Report(data)
		if err == nil {
			f.coordStep(clock.GotReport{Now: f.now, Subject: r.id, Msg: o})
		}
	})
}

// computeTurn runs the robot's rollout turn (and its guesses) for real and
// delivers the result TurnTime later, plus TurnTime per recomputed guess.
func (f *Fleet) computeTurn(r *robot, c turn.Compute) {
	t0 := time.Now()
	cfg := c.Params.Decide()
	known := c.Known
	own := f.cfg.TurnTime
	if f.faults != nil {
		own += f.faults.SlowBy(int(c.Round), r.id)
	}
	took := own
	if len(c.Guess) > 0 {
		known = append([]int(nil), c.Known...)
		ctx := &signal.Context{X: c.State, Round: c.Round, Order: c.Order, Robot: r.id, Known: c.Known, Last: c.Last,
			Seed: c.Params.Seed, Decide: cfg}
		// As the daemon: stop recomputing once one more and the robot's own
		// turn no longer fit before its deadline, less the hop and margin.
		due := c.Due - f.cfg.GuessMargin - f.cfg.Link.Hop
		recomputed := time.Duration(0)
		ctx.Expired = func() bool {
			if f.now+recomputed+2*f.cfg.TurnTime >= due {
				return true
			}
			recomputed += f.cfg.TurnTime
			return false
		}
		src, _ := f.sources.Get(c.GuessSource)
		src.Fill(ctx, c.Guess, known)
		if src.Name() == "recompute" || src.Name() == "checked" {
			took += recomputed
		}
	}
	ctl, _ := f.decider.Turn(c.State, r.id, known, decide.TurnSeed(c.Params.Seed, int(c.Round), r.id), cfg)
	f.compute += time.Since(t0)
	// The decision reports its own turn's compute (as the daemon does:
	// recomputed guesses are not the turn), but it is ready only after all.
	ev := turn.Computed{Epoch: c.Epoch, Round: c.Round, Control: ctl, Took: own}
	f.at(f.now+took, func() { ev.Now = f.now; f.robotStep(r, ev) })
}

// observe is robot r's software reporting round's outcome to its daemon.
func (f *Fleet) observe(r *robot, round uint64, applied int) {
	pos, seen := f.world.Report(r.id)
	acts, err := r.m.Observe(f.now, round, pos, applied, seen)
	if err != nil {
		return // a refused report is the robot software's problem; the coordinator keeps its last position
	}
	f.robotApply(r, acts)
}

// ---- the robots' software and the world ----

// software: robot r's software is waiting for the current round's close;
// once every robot has its answer, the world carries the round out.
func (f *Fleet) software(r *robot) {
	if f.answers == nil || f.answers[r.id] != nil {
		return
	}
	v := r.m.View(f.now, uint64(f.round), true)
	if !v.Done {
		return
	}
	f.answers[r.id] = &v
	f.maybeStep()
}

// softDeadline ends the software's wait of world step step (the number
// of steps carried out before it).
func (f *Fleet) softDeadline(step int) func() {
	return func() {
		if len(f.results) != step || f.answers == nil {
			return
		}
		round := f.round
		for i, r := range f.robots {
			if f.answers[i] == nil {
				// Out of time: what the local interface answers then, as
				// `sim fleet` reads it: the robot's own decision when it
				// has one (the close did not come), else a hold.
				v := r.m.View(f.now, uint64(round), true)
				f.answers[i] = &v
			}
		}
		f.maybeStep()
	}
}

func (f *Fleet) maybeStep() {
	if len(f.results) >= f.target {
		return
	}
	for _, a := range f.answers {
		if a == nil {
			return
		}
	}
	res := fleetsum.Round{Round: len(f.results) + 1, Decided: make([]int, len(f.robots))}
	for i, v := range f.answers {
		if v.Hold {
			res.Decided[i] = -1
			res.Held++
		} else {
			res.Decided[i] = v.Control
			if len(v.Guessed) > 0 {
				res.Guessed++
				res.GuessedBy = append(res.GuessedBy, i)
			}
		}
		res.LatencyUs = max(res.LatencyUs, v.LatencyUs)
	}
	if res.LatencyUs == 0 {
		// No robot saw the close: the round lasted as long as the
		// software waited for it.
		res.LatencyUs = uint64((f.now - f.started) / time.Microsecond)
	}
	res.Mode = f.modes[uint64(f.round)]
	delete(f.modes, uint64(f.round))
	u := res.Controls()
	res.Cost = f.world.Apply(u)
	f.results = append(f.results, res)
	if f.onRound != nil {
		f.onRound(res)
	}
	done := f.round
	// The software waits for the next round only if this one started
	// somewhere: when every robot timed out before the coordinator even
	// started it (its reports are late), the world moved on with every
	// robot holding, and the same round is still to come.
	started := false
	for _, r := range f.robots {
		started = started || r.m.Round() >= uint64(done)
	}
	if started {
		f.round++
	}
	f.answers = make([]*turn.View, len(f.robots))
	f.started = f.now
	f.at(f.now+f.cfg.Wait, f.softDeadline(len(f.results)))
	for i, r := range f.robots {
		// A robot that never saw this round reports on the last it saw.
		f.observe(r, min(uint64(done), r.m.Round()), u[i])
	}
	// A robot may already be deciding the next round.
	for _, r := range f.robots {
		f.software(r)
	}
}
