// Package turn is one robot's side of the round protocol as a pure state
// machine: events in, actions out. It does no I/O and has no clock: time
// arrives inside events (Now, a monotonic offset the driver chooses) and
// waiting is expressed by asking the driver to arm a timer. agentd drives it
// from NATS and real time; tests and the simulator drive it from an
// in-memory network with virtual time.
package turn

import (
	"time"

	pb "baton/proto"
)

// Mode of a round (mirrors pb.Mode).
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

// Event is one input to the machine.
type Event interface{ isEvent() }

// Round: a RoundStart arrived (already decoded and checked against the
// fleet by the driver, which owns the scenario).
type Round struct {
	Now       time.Duration
	Round     uint64
	Order     []int           // robot ids in turn order
	Deadlines []time.Duration // Deadlines[k]: offset from Now by which turn k is due
	Mode      Mode
	Controls  []int // number of valid controls per robot id in this round's state
}

// Heard: a Decision message arrived from the network, raw (the machine
// decodes it so malformed bytes are counted in one place).
type Heard struct {
	Now  time.Duration
	Data []byte
}

// Timer: a timer the machine armed has fired.
type Timer struct {
	Now   time.Duration
	Round uint64
}

// Computed: the driver finished the Compute the machine asked for.
type Computed struct {
	Now     time.Duration
	Round   uint64
	Control int
	Took    time.Duration
}

func (Round) isEvent()    {}
func (Heard) isEvent()    {}
func (Timer) isEvent()    {}
func (Computed) isEvent() {}

// Action is one output of the machine.
type Action interface{ isAction() }

// Arm asks the driver to deliver Timer{Round} at time At (same clock as Now).
type Arm struct {
	Round uint64
	At    time.Duration
}

// Compute asks the driver to run this robot's rollout turn. Known[j] is the
// control of robot j when it is a predecessor that was heard; Guess lists
// the predecessors the guess source must fill in; every other robot (the
// successors, and robots not in the order) is at its base control, which is
// what decide.Decider.Turn does for entries of -1. Known has one entry per
// robot id, -1 where not heard.
type Compute struct {
	Round uint64
	Known []int
	Guess []int
}

// Publish asks the driver to send this robot's decision.
type Publish struct {
	Decision *pb.Decision
}

// Drop reports a message that was not acted on, with why. The driver counts
// every drop and logs the first of each (reason, sender).
type Drop struct {
	Reason DropReason
	Sender string // robot id or sender name when known, else ""
	Detail string
}

func (Arm) isAction()     {}
func (Compute) isAction() {}
func (Publish) isAction() {}
func (Drop) isAction()    {}

// DropReason classifies dropped messages.
type DropReason string

const (
	DropMalformed  DropReason = "malformed"    // bytes that do not decode, or out-of-range fields
	DropForeign    DropReason = "foreign"      // another fleet's message
	DropStale      DropReason = "stale"        // a round that is already over for this robot
	DropFuture     DropReason = "future"       // a round more than one ahead of the current one
	DropDuplicate  DropReason = "duplicate"    // a second decision from the same robot for a round
	DropNotInOrder DropReason = "not-in-order" // a sender that is not in this round's order
)

// Config is fixed for a machine's life.
type Config struct {
	Fleet  string
	Robot  int
	Robots int    // fleet size: robot ids are 0..Robots-1
	Sender string // this robot's sender name for published decisions
}
