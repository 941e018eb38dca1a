// Package turn is the round protocol's robot side as a pure state machine,
// and the protocol's vocabulary (messages, bounds, drop reasons) that the
// coordinator's machine (coordinator/clock) shares.
//
// The machine owns everything a robot knows about rounds: which coordinator
// run it follows, the current round and its state, what it heard, its own
// decision, the closes, and the last rounds for the robot's local interface.
// It does no I/O and has no clock: time arrives inside events (Now, a
// monotonic offset the driver chooses) and waiting is expressed by asking
// the driver to arm a timer. agentd drives it from NATS and real time; the
// virtual-time fleet (sim/vfleet) drives whole fleets of them in one
// process. proto/PROTOCOL.md describes states, events, actions and
// admission rules.
package turn

import (
	"fmt"
	"time"

	"baton/sim/model"
)

// Mode of a round; the values are the wire's.
type Mode int

const (
	Sequential Mode = iota + 1 // wait for every predecessor
	Parallel                   // wait for none: guess them all
	Hybrid                     // wait until the deadline, guess the rest
)

func (m Mode) String() string {
	switch m {
	case Sequential:
		return "sequential"
	case Parallel:
		return "parallel"
	case Hybrid:
		return "hybrid"
	}
	return "unknown"
}

// ParseMode reads "sequential", "parallel" or "hybrid".
func ParseMode(s string) (Mode, bool) {
	for _, m := range []Mode{Sequential, Parallel, Hybrid} {
		if m.String() == s {
			return m, true
		}
	}
	return 0, false
}

// Config is fixed for a machine's life.
type Config struct {
	Fleet  string
	Robot  int
	Model  model.Fleet // the scenario: fleet size, controls, snapshot checks
	Digest string      // scenario digest; round starts naming another are refused ("" : not checked)
	Sender string      // this robot's sender name for its decisions and reports
	// Stale: with no round start admitted for this long the robot holds
	// (default 10s).
	Stale time.Duration
}

// Event is one input to the machine.
type Event interface{ isEvent() }

// GotStart: a round start arrived (decoded by the shell, not yet checked).
type GotStart struct {
	Now time.Duration
	Msg Start
}

// GotDecision: a decision arrived on the subject of robot Subject (-1 when
// the subject names none).
type GotDecision struct {
	Now     time.Duration
	Subject int
	Msg     Decision
}

// GotClose: a round close arrived.
type GotClose struct {
	Now time.Duration
	Msg Close
}

// GotHello: a report request arrived.
type GotHello struct {
	Now time.Duration
	Msg Hello
}

// Timer: a timer the machine armed has fired.
type Timer struct {
	Now          time.Duration
	Epoch, Round uint64
	Kind         TimerKind
}

// Computed: the driver finished the Compute the machine asked for.
type Computed struct {
	Now          time.Duration
	Epoch, Round uint64
	Control      int
	Took         time.Duration
}

func (GotStart) isEvent()    {}
func (GotDecision) isEvent() {}
func (GotClose) isEvent()    {}
func (GotHello) isEvent()    {}
func (Timer) isEvent()       {}
func (Computed) isEvent()    {}

// Action is one output of the machine.
type Action interface{ isAction() }

// Arm asks the driver to deliver Timer{Epoch, Round, Kind} at time At
// (same clock as Now).
type Arm struct {
	Epoch, Round uint64
	At           time.Duration
	Kind         TimerKind
}

// TimerKind says what a timer is for.
type TimerKind uint8

const (
	// Deadline: a hybrid turn's wait for its predecessors ends.
	Deadline TimerKind = iota
	// RepeatDecision: send this robot's decision again (no close yet).
	RepeatDecision
	// RepeatReport: send this robot's report again (no next round yet).
	RepeatReport
)

// Compute asks the driver to run this robot's rollout turn. Known[j] is the
// control of robot j when it is a predecessor that was heard, -1 otherwise;
// Guess lists the predecessors the guess source must fill in, in turn order;
// every other robot (successors, robots not in the order) is at its base
// control, which is what decide.Decider.Turn does for entries of -1. The
// driver must not modify State or the slices.
type Compute struct {
	Epoch, Round uint64
	Known        []int
	Guess        []int
	State        model.State
	Params       Params
	Order        []int
	GuessSource  string
	// Last is every robot's control in the previous round as closed (-1
	// where it held), nil when that close was not seen: the last source.
	Last []int
	// Due is when this robot's decision is due (same clock as Now): what a
	// guess source that spends time must leave room for.
	Due time.Duration
}

// Publish asks the driver to send this robot's decision. Since is how long
// after the round's start it was reached (the turn's latency).
type Publish struct {
	Decision Decision
	Mode     Mode
	Since    time.Duration
	// Repeat: the same decision again, for peers or a coordinator that
	// may have lost it (not a new turn).
	Repeat bool
}

// SendReport asks the driver to send a report to the coordinator: the
// robot's own (accepted by Observe), or the latest one again because a
// coordinator asked (Resent).
type SendReport struct {
	Report Report
	Resent bool
}

// Began tells the driver a round start was admitted (metrics, model
// fetches, benchmarks).
type Began struct {
	Epoch, Round uint64
	NewRun       bool // the first round of a coordinator run this robot follows
	ModelVersion uint64
	Resync       bool // admitted only because its run kept coming (ResyncAfter)
}

// Late: a valid decision from a predecessor came after this robot had
// already decided without it. Counted, not dropped: the message was fine,
// the link was slow.
type Late struct{ Robot int }

// Note is something the operator should read in the log.
type Note struct {
	Warn bool
	Text string
}

func (Arm) isAction()        {}
func (Compute) isAction()    {}
func (Publish) isAction()    {}
func (SendReport) isAction() {}
func (Began) isAction()      {}
func (Note) isAction()       {}
func (Late) isAction()       {}

// Set parses a mode name, so a Mode can be a command-line flag.
func (m *Mode) Set(s string) error {
	v, ok := ParseMode(s)
	if !ok {
		return fmt.Errorf("%q: use sequential, parallel or hybrid", s)
	}
	*m = v
	return nil
}
