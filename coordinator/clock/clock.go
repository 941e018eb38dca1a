// Package clock is the coordinator's side of the round protocol as a pure
// state machine, the counterpart of agentd/turn: events in (a report, a
// decision, membership, a timer), actions out (send a round start, a close,
// a report request; arm a timer; file a decision-log line). It does no I/O
// and has no clock; the coordinator's shell (coordinator/hub) drives it from
// NATS, gossip and real time, and the virtual-time fleet (sim/vfleet) from
// an in-memory network.
//
// A run goes: gathering (ask every robot for its latest report, build the
// first state from the answers), then rounds: start, collect decisions until
// every robot in the order decided or is past its deadline, close, collect
// the robots' reports and build the next state from them, wait for the
// period, start the next. proto/PROTOCOL.md has the whole picture.
package clock

import (
	"fmt"
	"slices"
	"sort"
	"strconv"
	"time"

	"baton/agentd/turn"
	"baton/sim/model"
)

// Event is one input to the machine.
type Event interface{ isEvent() }

// Begin starts the run: gathering the robots' first reports.
type Begin struct{ Now time.Duration }

// Tick: a timer the machine armed has fired (extra ticks are harmless).
type Tick struct{ Now time.Duration }

// Members: the robots gossip reports alive now.
type Members struct {
	Now   time.Duration
	Alive []int
}

// GotDecision: a decision arrived on robot Subject's subject (-1: none).
type GotDecision struct {
	Now     time.Duration
	Subject int
	Msg     turn.Decision
}

// GotReport: a report arrived on robot Subject's subject (-1: none).
type GotReport struct {
	Now     time.Duration
	Subject int
	Msg     turn.Report
}

// SetModel names the guess model version robots should use from the next
// round start on.
type SetModel struct {
	Now     time.Duration
	Version uint64
}

// Stop: the run is being interrupted; the round in play is filed as it is.
type Stop struct{ Now time.Duration }

// CloseSent: the shell published round Round's close at Now. A shell may
// hold a close back (until the round is in the durable log); the wait for
// reports and the close's repeats count from here.
type CloseSent struct {
	Now   time.Duration
	Round uint64
}

func (Begin) isEvent()       {}
func (Tick) isEvent()        {}
func (Members) isEvent()     {}
func (GotDecision) isEvent() {}
func (GotReport) isEvent()   {}
func (SetModel) isEvent()    {}
func (Stop) isEvent()        {}
func (CloseSent) isEvent()   {}

// Action is one output of the machine.
type Action interface{ isAction() }

// SendStart publishes a round start; Repeat: a copy of the one in play,
// for robots that may have lost it (Msg.AgeUs says how late it is).
type SendStart struct {
	Msg    turn.Start
	Repeat bool
}

// SendClose publishes a round close; Repeat: a copy, for robots whose
// reports have not come.
type SendClose struct {
	Msg    turn.Close
	Repeat bool
}

// SendHello asks every robot for its latest report.
type SendHello struct{ Msg turn.Hello }

// Arm asks for a Tick at At.
type Arm struct{ At time.Duration }

// Closed: a round closed (decisions, held robots, latency are final; stage
// cost and reports are not yet).
type Closed struct{ Record Record }

// Filed: a round's reports are filed; Record is its decision-log line.
type Filed struct{ Record Record }

// Late: a valid decision for a round that had already closed.
type Late struct {
	Robot int
	Round uint64
}

// Note is something the operator should read in the log; Robot is the
// robot it is about (-1: none).
type Note struct {
	Warn  bool
	Text  string
	Robot int
	Round uint64
}

// Finished: every round asked for (Config.Rounds) is filed.
type Finished struct{}

// Drop reports a message that was not acted on (reasons as agentd/turn's).
type Drop struct {
	Reason turn.DropReason
	Sender string
	Detail string
}

func (SendStart) isAction() {}
func (SendClose) isAction() {}
func (SendHello) isAction() {}
func (Arm) isAction()       {}
func (Closed) isAction()    {}
func (Filed) isAction()     {}
func (Late) isAction()      {}
func (Note) isAction()      {}
func (Finished) isAction()  {}
func (Drop) isAction()      {}

// Record is one round as the decision log keeps it. (Epoch, Round) is
// unique across runs: a restarted coordinator has a larger epoch.
type Record struct {
	Epoch    uint64 `json:"epoch"`
	Round    uint64 `json:"round"`
	Scenario string `json:"scenario"`
	Digest   string `json:"digest"`
	Mode     string `json:"mode"`
	Guess    string `json:"guess"`
	Model    uint64 `json:"guess_model_version,omitempty"`
	Order    []int  `json:"order"`
	Controls []int  `json:"controls"`
	// Applied is what each robot carried out (its report's, else the
	// decided control): the stage cost is the state's under these.
	Applied   []int      `json:"applied,omitempty"`
	Held      []int      `json:"held"`
	Stalled   *int       `json:"stalled_by,omitempty"`
	Decisions []Decision `json:"decisions"`
	LatencyUs uint64     `json:"latency_us"`
	Reports   int        `json:"reports"`
	Missing   []int      `json:"missing_reports"`
	Stage     float64    `json:"stage_cost"`
	Snapshot  *StateWire `json:"state,omitempty"`
	// Interrupted: the run stopped before this round's reports were filed.
	Interrupted bool `json:"interrupted,omitempty"`
	// Start is when the round started (the machine's clock).
	Start time.Duration `json:"-"`
}

// StateWire is the decided-on state, for replaying a log.
type StateWire struct {
	Ints  []int32   `json:"ints"`
	Reals []float64 `json:"reals,omitempty"`
}

// Decision is one robot's decision as logged.
type Decision struct {
	Robot     int      `json:"robot"`
	Control   int      `json:"control"`
	Heard     []uint32 `json:"heard"`
	Guessed   []uint32 `json:"guessed"`
	ComputeUs uint64   `json:"compute_us"`
	HopUs     uint64   `json:"hop_us"`
	AfterUs   uint64   `json:"after_us"`
}

type phase int

const (
	unstarted  phase = iota
	gathering        // round 0: waiting for robots' first reports
	pacing           // between rounds: the period, or no live robot
	collecting       // decisions of the round in play
	reporting        // reports of the round just closed
	finished
)

// Machine is a coordinator run. Not safe for concurrent use.
type Machine struct {
	cfg    Config
	m      model.Fleet
	robots int
	phase  phase
	x      model.State // the state the next round decides on
	now    time.Duration

	alive     []int
	haveAlive bool
	model     uint64
	monitor   *turn.LinkMonitor
	compute   *turn.LinkMonitor // robots' turn compute times, for the switch

	gatherAt time.Duration
	helloAt  time.Duration
	gathered []*turn.Report // round 0: the latest report of each robot
	first    bool           // the next round is the run's first

	round     uint64
	startAt   time.Duration
	nextAt    time.Duration
	order     []int
	pos       []int // robot -> index in order, -1
	deadlines []time.Duration
	mode      turn.Mode
	controls  []int // valid controls per robot in the round's state
	got       []*turn.Decision
	conflict  []bool // robots with two different decisions this round
	lastAt    time.Duration
	rec       Record
	closeAt   time.Duration
	closeSent bool           // the shell published the close (ConfirmCloses)
	reports   []*turn.Report // this round's, per robot
	positions []*turn.Report // position reports to absorb at the next filing
	scratch   model.State

	lastOrder  []int
	heldRun    []int // rounds in a row each robot missed its own turn
	stallRun   []int // sequential rounds in a row each robot stalled
	saidNoLive bool
	saidNewer  bool

	armed time.Duration // the last tick asked for by arm

	// Repeats (turn.RepeatEvery): the round's start and close as sent,
	// when the next copy is due, and copies of robots' messages already had.
	startMsg   turn.Start
	closeMsg   turn.Close
	repeatAt   time.Duration
	sentCopies int
	repeats    uint64
	filedFrom  []bool // robots whose report the last filed round had

	drops map[turn.DropReason]uint64
	late  uint64
}

// New returns a machine for one run; cfg must pass Validate.
func New(cfg Config) *Machine {
	robots := cfg.Model.Robots()
	// The switch looks at the last four rounds' hops: long enough that one
	// slow hop does not flip a round, short enough to switch back within a
	// few rounds once the links recover.
	mon := turn.NewLinkMonitor(0, max(8, 4*robots), 0)
	return &Machine{cfg: cfg, m: cfg.Model, robots: robots, monitor: mon, compute: turn.NewLinkMonitor(0, 0, 0), drops: map[turn.DropReason]uint64{},
		gathered: make([]*turn.Report, robots), reports: make([]*turn.Report, robots), positions: make([]*turn.Report, robots),
		got: make([]*turn.Decision, robots), filedFrom: make([]bool, robots), conflict: make([]bool, robots), heldRun: make([]int, robots), stallRun: make([]int, robots),
		scratch: cfg.Model.NewState()}
}

// Round is the round in play or last played (0 while gathering).
func (c *Machine) Round() uint64 { return c.round }

// Epoch is this run's epoch.
func (c *Machine) Epoch() uint64 { return c.cfg.Epoch }

// Drops is a copy of the drop counts by reason.
func (c *Machine) Drops() map[turn.DropReason]uint64 {
	out := make(map[turn.DropReason]uint64, len(c.drops))
	for r, n := range c.drops {
		out[r] = n
	}
	return out
}

// Late is how many valid decisions arrived after their round closed.
func (c *Machine) Late() uint64 { return c.late }

// Step feeds one event and returns what the driver must do, in order.
func (c *Machine) Step(ev Event) []Action {
	var acts []Action
	switch e := ev.(type) {
	case Begin:
		c.now = e.Now
		if c.phase != unstarted {
			return nil
		}
		acts = c.begin()
	case Tick:
		c.now = max(c.now, e.Now)
	case Members:
		c.now = max(c.now, e.Now)
		c.setAlive(e.Alive)
	case GotDecision:
		c.now = max(c.now, e.Now)
		acts = c.onDecision(e)
	case GotReport:
		c.now = max(c.now, e.Now)
		acts = c.onReport(e)
	case SetModel:
		c.now = max(c.now, e.Now)
		c.model = e.Version
	case Stop:
		c.now = max(c.now, e.Now)
		return c.stop()
	case CloseSent:
		c.now = max(c.now, e.Now)
		if c.phase == reporting && e.Round == c.round && !c.closeSent {
			c.closeSent = true
			c.closeAt, c.repeatAt = max(c.closeAt, c.now), c.now+c.repeatEvery()
		}
	default:
		return nil
	}
	if c.phase == unstarted || c.phase == finished {
		return acts
	}
	return append(acts, c.poll()...)
}

func (c *Machine) drop(r turn.DropReason, sender, format string, args ...any) []Action {
	c.drops[r]++
	return []Action{Drop{Reason: r, Sender: sender, Detail: fmt.Sprintf(format, args...)}}
}

func (c *Machine) begin() []Action {
	c.phase, c.gatherAt, c.first = gathering, c.now, true
	c.round = c.cfg.Resume
	if c.cfg.Rounds > 0 && c.round >= uint64(c.cfg.Rounds) {
		c.phase = finished
		return []Action{Note{Text: fmt.Sprintf("all %d rounds are already in the decision log; nothing left to play", c.cfg.Rounds), Robot: -1}, Finished{}}
	}
	c.x = c.m.NewState()
	c.m.Start(c.x, model.NewRNG(0).Rand)
	c.helloAt = c.now + c.cfg.HelloEvery
	return []Action{
		Note{Text: fmt.Sprintf("waiting for robots' first reports (asking every %s)", c.cfg.HelloEvery), Robot: -1},
		c.hello(), Arm{At: c.helloAt}, Arm{At: c.gatherAt + c.cfg.GatherWait},
	}
}

// currentReport: a gathered report says where the robot is now. For a
// resumed run that is a report of the last round the old run closed (or
// later): the robots may have carried that round out after the old
// coordinator died, and a report from before it would put them where they
// were.
func (c *Machine) currentReport(g *turn.Report) bool {
	return g != nil && (c.cfg.Resume == 0 || g.Round >= c.cfg.Resume)
}

func (c *Machine) hello() SendHello {
	return SendHello{Msg: turn.Hello{Fleet: c.cfg.Fleet, Epoch: c.cfg.Epoch, Sender: c.cfg.Sender}}
}

// setAlive keeps the live robots that exist, sorted and unique.
func (c *Machine) setAlive(alive []int) {
	c.alive = c.alive[:0]
	for _, r := range alive {
		if r >= 0 && r < c.robots {
			c.alive = append(c.alive, r)
		}
	}
	sort.Ints(c.alive)
	c.alive = slices.Compact(c.alive)
	c.haveAlive = true
}

// orderNow is the preferred order restricted to live robots.
func (c *Machine) orderNow() []int {
	var out []int
	for _, r := range c.cfg.order(c.robots) {
		if !c.haveAlive || slices.Contains(c.alive, r) {
			out = append(out, r)
		}
	}
	return out
}

// poll moves the run along as far as the clock and what has arrived allow.
func (c *Machine) poll() []Action {
	var acts []Action
	for {
		switch c.phase {
		case gathering:
			if c.now >= c.helloAt {
				for c.helloAt <= c.now {
					c.helloAt += c.cfg.HelloEvery
				}
				acts = append(acts, c.hello(), Arm{At: c.helloAt})
			}
			n, current := 0, 0
			for _, g := range c.gathered {
				if g != nil {
					n++
				}
				if c.currentReport(g) {
					current++
				}
			}
			if current < c.robots && (n == 0 || c.now < c.gatherAt+c.cfg.GatherWait) {
				return acts
			}
			for r, g := range c.gathered {
				if g != nil {
					c.absorb(r, g)
				}
			}
			c.phase, c.nextAt = pacing, c.now
		case pacing:
			if c.now < c.nextAt {
				return append(acts, c.arm(c.nextAt)...)
			}
			order := c.orderNow()
			if len(order) == 0 {
				if !c.saidNoLive {
					c.saidNoLive = true
					acts = append(acts, Note{Warn: true, Text: "no live robots; waiting for one to join", Robot: -1, Round: c.round + 1})
				}
				return acts
			}
			c.saidNoLive = false
			acts = append(acts, c.start(order)...)
		case collecting:
			if next, ok := c.settled(); !ok {
				// Turns are missing: a robot may have lost the start.
				if c.now >= c.repeatAt && c.sentCopies < turn.MaxRepeats {
					s := c.startMsg
					s.AgeUs = uint64(max(c.now-c.startAt, 0) / time.Microsecond)
					acts = append(acts, SendStart{Msg: s, Repeat: true})
					c.sentCopies++
					c.repeatAt = c.now + c.repeatEvery()
				}
				return append(acts, c.arm(c.nextRepeat(next))...)
			}
			acts = append(acts, c.close()...)
			c.sentCopies, c.repeatAt = 0, c.now+c.repeatEvery()
		case reporting:
			if !c.reportsIn() && c.cfg.ConfirmCloses && !c.closeSent {
				return acts // the close has not gone out: nobody could report yet
			}
			if !c.reportsIn() && c.now < c.closeAt+c.cfg.ReportWait {
				// Reports are missing: a robot may have lost the close.
				if c.now >= c.repeatAt && c.sentCopies < turn.MaxRepeats {
					acts = append(acts, SendClose{Msg: c.closeMsg, Repeat: true})
					c.sentCopies++
					c.repeatAt = c.now + c.repeatEvery()
				}
				return append(acts, c.arm(c.nextRepeat(c.closeAt+c.cfg.ReportWait))...)
			}
			acts = append(acts, c.file())
			if c.cfg.Rounds > 0 && c.round >= uint64(c.cfg.Rounds) {
				c.phase = finished
				return append(acts, Finished{})
			}
			c.phase, c.nextAt = pacing, max(c.now, c.startAt+c.cfg.Period)
		default:
			return acts
		}
	}
}

// arm asks for a tick at at, unless the last one asked for is that one:
// every event re-polls, and one timer per deadline is enough.
func (c *Machine) arm(at time.Duration) []Action {
	if at == c.armed {
		return nil
	}
	c.armed = at
	return []Action{Arm{At: at}}
}

func (c *Machine) start(order []int) []Action {
	var acts []Action
	c.round++
	c.startAt, c.order, c.phase = c.now, order, collecting
	c.mode = c.cfg.Mode
	if c.cfg.AutoParallel && c.cfg.Period > 0 && c.mode != turn.Parallel &&
		c.monitor.Suggest(len(order), c.compute.EWMA(), c.cfg.Period) == turn.Parallel {
		c.mode = turn.Parallel
	}
	c.pos = make([]int, c.robots)
	for r := range c.pos {
		c.pos[r] = -1
	}
	c.deadlines = make([]time.Duration, len(order))
	deadlinesUs := make([]uint64, len(order))
	order32 := make([]uint32, len(order))
	for k, r := range order {
		c.pos[r] = k
		c.deadlines[k] = time.Duration(k+1) * c.cfg.TurnBudget
		deadlinesUs[k] = uint64(c.deadlines[k] / time.Microsecond)
		order32[k] = uint32(r)
	}
	c.controls = make([]int, c.robots)
	for r := range c.controls {
		c.controls[r] = c.m.NumControls(c.x, r)
	}
	clear(c.got)
	clear(c.conflict)
	clear(c.reports)
	ints, reals := c.m.Flatten(c.x, nil, nil)
	c.rec = Record{Epoch: c.cfg.Epoch, Round: c.round, Scenario: c.m.Name(), Digest: c.cfg.Digest, Mode: c.mode.String(), Guess: c.cfg.Guess, Model: c.model,
		Order: order, Controls: make([]int, c.robots), Held: []int{}, Decisions: []Decision{},
		Snapshot: &StateWire{Ints: ints, Reals: reals}, Start: c.now}

	if c.first {
		c.first = false
		for _, r := range order {
			switch g := c.gathered[r]; {
			case g == nil:
				acts = append(acts, Note{Warn: true, Robot: r, Round: c.round, Text: fmt.Sprintf(
					"starting round %d without a report from robot %d: it is taken to be at its start position until it reports", c.round, r)})
			case !c.currentReport(g):
				acts = append(acts, Note{Warn: true, Robot: r, Round: c.round, Text: fmt.Sprintf(
					"starting round %d with robot %d's report of round %d: its report of round %d (the last one closed) did not come within the first-report wait, and it may have moved since",
					c.round, r, g.Round, c.cfg.Resume)})
			}
		}
		clear(c.gathered)
	}
	if c.lastOrder != nil {
		for _, r := range c.lastOrder {
			if !slices.Contains(order, r) {
				acts = append(acts, Note{Warn: true, Robot: r, Round: c.round, Text: fmt.Sprintf("robot %d left the order (gossip reports it gone)", r)})
			}
		}
		for _, r := range order {
			if !slices.Contains(c.lastOrder, r) {
				acts = append(acts, Note{Robot: r, Round: c.round, Text: fmt.Sprintf("robot %d joined the order", r)})
			}
		}
	}
	c.lastOrder = order
	msg := turn.Start{Fleet: c.cfg.Fleet, Epoch: c.cfg.Epoch, Round: c.round, Sender: c.cfg.Sender, Scenario: c.m.Name(),
		Ints: ints, Reals: reals, Order: order32, DeadlinesUs: deadlinesUs, Mode: c.mode, Params: c.cfg.Params(),
		Digest: c.cfg.Digest, Guess: c.cfg.Guess, ModelVersion: c.model}
	c.startMsg, c.sentCopies, c.repeatAt = msg, 0, c.now+c.repeatEvery()
	return append(acts, SendStart{Msg: msg})
}

func (c *Machine) repeatEvery() time.Duration { return turn.RepeatEvery(c.cfg.TurnBudget) }

// Grace is how long past a turn's deadline the coordinator still takes
// its decision: two repeats (robots repeat every quarter turn budget).
func Grace(turnBudget time.Duration) time.Duration { return 2 * turn.RepeatEvery(turnBudget) }

// lastFiled is the last round whose reports were filed (0: none).
func (c *Machine) lastFiled() uint64 {
	if c.phase == collecting || c.phase == reporting {
		return c.round - 1
	}
	return c.round
}

// nextRepeat is the next tick: at, or the next copy's time if one is due
// before it (none once MaxRepeats went out).
func (c *Machine) nextRepeat(at time.Duration) time.Duration {
	if c.sentCopies >= turn.MaxRepeats {
		return at
	}
	return min(at, c.repeatAt)
}

// Repeats is how many copies of robots' decisions and reports arrived
// after the first.
func (c *Machine) Repeats() uint64 { return c.repeats }

// settled: every robot in the order decided or is past its own deadline
// plus Grace; otherwise the next such time still ahead.
func (c *Machine) settled() (time.Duration, bool) {
	next, ok := time.Duration(0), true
	// A decision sent just before its deadline may be lost once; its
	// repeats get Grace to arrive.
	grace := Grace(c.cfg.TurnBudget)
	for k, r := range c.order {
		due := c.startAt + c.deadlines[k] + grace
		if c.got[r] == nil && c.now < due {
			if ok || due < next {
				next = due
			}
			ok = false
		}
	}
	return next, ok
}

func (c *Machine) close() []Action {
	var acts []Action
	c.phase, c.closeAt, c.closeSent = reporting, c.now, false
	complete := true
	for _, r := range c.order {
		complete = complete && c.got[r] != nil
	}
	end := c.now
	if complete {
		end = c.lastAt
	}
	c.rec.LatencyUs = uint64(max(end-c.startAt, 0) / time.Microsecond)
	held := []uint32{}
	for r := range c.robots {
		if d := c.got[r]; d != nil {
			c.rec.Controls[r] = int(d.Control)
		} else {
			c.rec.Held = append(c.rec.Held, r)
			held = append(held, uint32(r))
		}
	}
	// Who missed a turn of their own: in sequential mode only the first
	// robot without a decision did; the ones after it were waiting for it.
	stalled := -1
	var waiting []int
	for _, r := range c.order {
		if c.got[r] != nil {
			continue
		}
		if c.mode == turn.Sequential && stalled >= 0 {
			waiting = append(waiting, r)
			continue
		}
		if c.mode == turn.Sequential {
			stalled = r
		}
	}
	for k, r := range c.order {
		missed := c.got[r] == nil && !slices.Contains(waiting, r)
		if !missed {
			c.heldRun[r] = 0
			continue
		}
		c.heldRun[r]++
		if c.heldRun[r] == 3 && r != stalled {
			acts = append(acts, Note{Warn: true, Robot: r, Round: c.round, Text: fmt.Sprintf(
				"robot %d is alive but has missed its turn (due %s after the start) 3 rounds in a row; check its log (same scenario file and --robots? slow link or compute?)",
				r, c.deadlines[k])})
		}
	}
	for r := range c.stallRun {
		if r != stalled {
			c.stallRun[r] = 0
		}
	}
	var stalledWire uint32
	if stalled >= 0 {
		stalledWire = uint32(stalled) + 1
		s := stalled
		c.rec.Stalled = &s
		c.stallRun[stalled]++
		if n := c.stallRun[stalled]; n == 1 || n%100 == 0 {
			acts = append(acts, Note{Warn: true, Robot: stalled, Round: c.round, Text: fmt.Sprintf(
				"sequential round %d stalled on robot %d: no decision by its deadline (%s after the start; %d rounds in a row); robots %v after it were waiting for it and hold too; the round closed after %s",
				c.round, stalled, c.deadlines[c.pos[stalled]], n, waiting, time.Duration(c.rec.LatencyUs)*time.Microsecond)})
		}
	}
	msg := turn.Close{Fleet: c.cfg.Fleet, Epoch: c.cfg.Epoch, Round: c.round, Sender: c.cfg.Sender,
		Controls: make([]int32, c.robots), Held: held, LatencyUs: c.rec.LatencyUs, Stalled: stalledWire}
	for r, u := range c.rec.Controls {
		msg.Controls[r] = int32(u)
	}
	c.closeMsg = msg
	return append(acts, SendClose{Msg: msg}, Closed{Record: c.rec})
}

// reportsIn: every robot that decided this round reported.
// A robot whose decision never came is not waited for: it may be cut off
// (its report is still taken if it comes before the filing), and waiting
// for it would hold every robot that did hear the round.
func (c *Machine) reportsIn() bool {
	for _, r := range c.order {
		if c.reports[r] == nil && c.got[r] != nil {
			return false
		}
	}
	return true
}

// file builds the next state: the decided controls, replaced by what each
// robot reports it carried out, advanced; then the reports absorbed.
func (c *Machine) file() Filed {
	u := slices.Clone(c.rec.Controls)
	for r, o := range c.reports {
		if o != nil && int(o.Applied) < c.controls[r] {
			u[r] = int(o.Applied)
		}
	}
	c.rec.Applied = u
	c.rec.Stage = c.m.Advance(c.x, u)
	c.rec.Reports, c.rec.Missing = 0, []int{}
	for r, o := range c.reports {
		c.filedFrom[r] = o != nil
		if o != nil {
			c.rec.Reports++
			c.absorb(r, o)
		}
	}
	for r, o := range c.positions {
		if o != nil && c.reports[r] == nil {
			c.absorb(r, o)
		}
	}
	clear(c.positions)
	for _, r := range c.order {
		if c.reports[r] == nil {
			c.rec.Missing = append(c.rec.Missing, r)
		}
	}
	return Filed{Record: c.rec}
}

func (c *Machine) absorb(r int, o *turn.Report) {
	// Reports were checked on arrival against the state of the time; the
	// state moved since only by Advance, which keeps the same cells.
	_ = c.m.Absorb(c.x, r, o.Position, o.Seen)
}

func (c *Machine) stop() []Action {
	if c.phase != collecting && c.phase != reporting {
		c.phase = finished
		return nil
	}
	if c.phase == collecting {
		for r, d := range c.got {
			if d != nil {
				c.rec.Controls[r] = int(d.Control)
			}
		}
		c.rec.LatencyUs = uint64(max(c.now-c.startAt, 0) / time.Microsecond)
	}
	c.phase = finished
	c.rec.Interrupted = true
	return []Action{Filed{Record: c.rec}}
}

// ---- admission ----

func (c *Machine) onDecision(e GotDecision) []Action {
	d := e.Msg
	who := strconv.FormatUint(uint64(d.Robot), 10)
	if reason, why := turn.CheckDecision(d, c.cfg.Fleet, c.robots, e.Subject); reason != "" {
		return c.drop(reason, who, "%s", why)
	}
	switch {
	case d.Round == 0:
		return c.drop(turn.DropMalformed, who, "round 0: rounds start at 1")
	case d.Epoch < c.cfg.Epoch:
		return c.drop(turn.DropStale, who, "decision from an older coordinator run (epoch %d, this is %d)", d.Epoch, c.cfg.Epoch)
	case d.Epoch > c.cfg.Epoch:
		return append(c.newer(d.Epoch), c.drop(turn.DropFuture, who, "decision from a newer coordinator run (epoch %d, this is %d): is another coordinator running?", d.Epoch, c.cfg.Epoch)...)
	case d.Round > c.round:
		return c.drop(turn.DropFuture, who, "decision for round %d of run %d; this is round %d of run %d", d.Round, d.Epoch, c.round, c.cfg.Epoch)
	case d.Round < c.round:
		if d.Round+1 == c.round {
			c.repeats++ // a robot repeats its decision until it hears the close
			return nil
		}
		return c.drop(turn.DropStale, who, "decision for round %d during round %d", d.Round, c.round)
	case c.phase != collecting && c.got[d.Robot] != nil && c.got[d.Robot].Control == d.Control:
		c.repeats++
		return nil
	case c.phase != collecting:
		c.late++
		return []Action{Late{Robot: int(d.Robot), Round: d.Round}}
	}
	r := int(d.Robot)
	switch {
	case c.pos[r] < 0:
		return c.drop(turn.DropNotInOrder, who, "robot %d is not in round %d's order", r, c.round)
	case d.Control < 0 || int(d.Control) >= c.controls[r]:
		return c.drop(turn.DropRange, who, "control %d is outside 0..%d for robot %d", d.Control, c.controls[r]-1, r)
	case c.conflict[r]:
		return c.drop(turn.DropDuplicate, who, "another decision from robot %d in round %d, whose decisions conflict", r, c.round)
	case c.got[r] != nil && c.got[r].Control == d.Control:
		c.repeats++
		return nil
	case c.got[r] != nil:
		// One of the two is forged: take neither, and the robot holds
		// (its own machine refuses a close that gives it a control it
		// did not decide).
		first := c.got[r].Control
		c.got[r], c.conflict[r] = nil, true
		c.rec.Decisions = slices.DeleteFunc(c.rec.Decisions, func(x Decision) bool { return x.Robot == r })
		return c.drop(turn.DropDuplicate, who, "robot %d sent control %d and then %d for round %d: neither is used, the robot holds", r, first, d.Control, c.round)
	}
	for _, l := range [][]uint32{d.Heard, d.Guessed} {
		for _, p := range l {
			if uint64(p) >= uint64(c.robots) {
				return c.drop(turn.DropRange, who, "robot %d heard or guessed robot %d, outside 0..%d", r, p, c.robots-1)
			}
		}
	}
	c.got[r], c.lastAt = &d, c.now
	c.rec.Decisions = append(c.rec.Decisions, Decision{Robot: r, Control: int(d.Control), Heard: orEmpty(d.Heard),
		Guessed: orEmpty(d.Guessed), ComputeUs: d.ComputeUs, HopUs: d.HopUs, AfterUs: uint64(max(c.now-c.startAt, 0) / time.Microsecond)})
	if d.HopUs > 0 && d.HopUs < uint64(turn.MaxDeadline/time.Microsecond) {
		c.monitor.Observe(time.Duration(d.HopUs) * time.Microsecond)
	}
	if d.ComputeUs < uint64(turn.MaxDeadline/time.Microsecond) {
		c.compute.Observe(time.Duration(d.ComputeUs) * time.Microsecond)
	}
	return nil
}

func (c *Machine) onReport(e GotReport) []Action {
	o := e.Msg
	who := strconv.FormatUint(uint64(o.Robot), 10)
	switch {
	case o.Fleet != c.cfg.Fleet:
		return c.drop(turn.DropForeign, who, "report for fleet %.64q", o.Fleet)
	case len(o.Sender) > turn.MaxName || len(o.Seen) > turn.MaxSightings:
		return c.drop(turn.DropBounds, who, "report with a %d-byte sender and %d sightings", len(o.Sender), len(o.Seen))
	case uint64(o.Robot) >= uint64(c.robots):
		return c.drop(turn.DropRange, who, "report from robot %d of a %d-robot fleet", o.Robot, c.robots)
	case e.Subject != int(o.Robot):
		return c.drop(turn.DropSubject, who, "report of robot %d on robot %d's subject", o.Robot, e.Subject)
	case o.Applied < 0 || int(o.Applied) >= c.m.MaxControls():
		return c.drop(turn.DropRange, who, "applied control %d is outside 0..%d", o.Applied, c.m.MaxControls()-1)
	case o.Epoch > c.cfg.Epoch:
		return append(c.newer(o.Epoch), c.drop(turn.DropFuture, who, "report from a newer coordinator run (epoch %d, this is %d): is another coordinator running?", o.Epoch, c.cfg.Epoch)...)
	}
	r := int(o.Robot)
	position := o.Round == 0 || o.Epoch != c.cfg.Epoch
	if !position {
		switch {
		case o.Round == c.lastFiled() && !c.filedFrom[r] && c.positions[r] == nil:
			position = true // late for its round: still where the robot is
		case o.Round == c.lastFiled():
			c.repeats++ // robots repeat reports until the next round starts
			return nil
		case o.Round < c.round:
			return c.drop(turn.DropStale, who, "report for round %d during round %d", o.Round, c.round)
		case o.Round > c.round:
			return c.drop(turn.DropFuture, who, "report for round %d during round %d", o.Round, c.round)
		case c.reports[r] != nil && c.reports[r].Position == o.Position && c.reports[r].Applied == o.Applied:
			c.repeats++
			return nil
		case c.reports[r] != nil:
			return c.drop(turn.DropDuplicate, who, "second report for round %d", o.Round)
		}
	}
	c.m.CopyState(c.scratch, c.x)
	if err := c.m.Absorb(c.scratch, r, o.Position, o.Seen); err != nil {
		return c.drop(turn.DropMalformed, who, "report for round %d: %v", o.Round, err)
	}
	switch {
	case !position:
		c.reports[r] = &o
	case c.phase == gathering:
		// A resumed run's round numbers go on from the old run's, so the
		// latest report is the one of the latest round, whatever the order
		// they come in (a re-sent one may come after a new one).
		if g := c.gathered[r]; c.cfg.Resume == 0 || g == nil || o.Round >= g.Round {
			c.gathered[r] = &o
		}
	default:
		c.positions[r] = &o // where the robot is: taken at the next filing
	}
	return nil
}

// newer warns once that robots follow a newer run than this one: another
// coordinator for the fleet is running (or someone forges its messages).
func (c *Machine) newer(epoch uint64) []Action {
	if c.saidNewer {
		return nil
	}
	c.saidNewer = true
	return []Action{Note{Warn: true, Robot: -1, Round: c.round, Text: fmt.Sprintf(
		"messages from a newer coordinator run (epoch %d, this is %d): is another coordinator running for this fleet? (said once)", epoch, c.cfg.Epoch)}}
}

func orEmpty(s []uint32) []uint32 {
	if s == nil {
		return []uint32{}
	}
	return s
}
