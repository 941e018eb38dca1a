package turn

import (
	"fmt"
	"time"

	"baton/agentd/decide"
	"baton/sim/model"
)

// The protocol's messages as both machines see them: the wire's Protocol
// Buffers messages (proto/baton.proto) converted field for field by
// proto/wire, and not yet checked. Checking is admission, and admission
// happens in the machines only (Machine for a robot, clock.Machine for the
// coordinator), so every rule lives in one place.

// Params is the fleet's Monte Carlo effort and seed, fixed per round so every
// robot computes exactly what the in-process search would.
type Params struct {
	Samples      uint32
	Horizon      int32 // base-policy steps simulated after the first step (0: the first step only)
	TerminalCost bool
	Seed         uint64 // fleet seed: decide.TurnSeed(Seed, round, robot) seeds each turn
}

// Start opens a round (coordinator -> robots).
type Start struct {
	Fleet        string
	Epoch        uint64 // the coordinator run; a restarted coordinator has a larger one
	Round        uint64
	Sender       string
	Scenario     string // the snapshot's scenario name
	Ints         []int32
	Reals        []float64
	Order        []uint32 // robot ids in turn order; robots not listed hold
	DeadlinesUs  []uint64 // DeadlinesUs[k]: microseconds after receipt by which turn k is due
	Mode         Mode
	Params       Params
	Digest       string // scenario file + robot count
	Guess        string // guess source name
	ModelVersion uint64 // guess model version robots should use (0: none)
	// AgeUs: how long after the round began this copy was sent (repeats
	// of a start for robots that may have lost it; 0 on the first).
	AgeUs uint64
}

// Decision is one robot's choice for a round (robot -> robots, coordinator).
type Decision struct {
	Fleet     string
	Epoch     uint64
	Round     uint64
	Robot     uint32
	Control   int32
	Heard     []uint32 // predecessors heard in time
	Guessed   []uint32 // predecessors guessed
	ComputeUs uint64
	HopUs     uint64 // the sender's latest one-way hop to the bus
	Sender    string
}

// Close ends a round with the joint control the fleet carries out
// (coordinator -> robots).
type Close struct {
	Fleet     string
	Epoch     uint64
	Round     uint64
	Sender    string
	Controls  []int32  // one per robot id; 0 for robots that hold
	Held      []uint32 // robots without a decision in time: they hold
	LatencyUs uint64   // from the round start to the last decision, or to the close when one was missing
	// Stalled is the robot a sequential round waited for in vain, plus one
	// (0: none): the robots after it held only because they were waiting.
	Stalled uint32
}

// Report is what a robot's own software reports after acting (robot ->
// coordinator). Round 0, or an epoch other than the coordinator's, is a
// position report: where the robot is, outside any round of this run.
type Report struct {
	Fleet    string
	Epoch    uint64
	Round    uint64
	Robot    uint32
	Position int32
	Applied  int32 // the control actually carried out
	Seen     []model.Sighting
	Sender   string
}

// Hello asks every robot to re-send its latest report (coordinator ->
// robots): a new or restarted coordinator builds its first round from them.
type Hello struct {
	Fleet  string
	Epoch  uint64
	Sender string
}

// Bounds on everything from the bus that sizes work or memory. A message
// over any of them is dropped and counted (DropBounds); the coordinator
// refuses configurations over them at start. proto/PROTOCOL.md explains
// each.
const (
	// MaxMessageBytes bounds every protocol message before it is decoded.
	MaxMessageBytes = 1 << 20
	// MaxRobots bounds the fleet size, the order and every robot list.
	MaxRobots = model.MaxRobots
	// MaxSamples bounds Monte Carlo samples per Q-factor.
	MaxSamples = decide.MaxSamples
	// MaxHorizon bounds the base-policy steps simulated per sample.
	MaxHorizon = decide.MaxHorizon
	// MaxSimSteps bounds Samples x (Horizon+1), the simulated steps behind
	// one Q-factor: a turn costs at most this times the robot's controls.
	MaxSimSteps = decide.MaxSimSteps
	// MaxDeadline bounds every turn deadline in a round start.
	MaxDeadline = 10 * time.Minute
	// MaxLatency bounds a close's reported round latency.
	MaxLatency = time.Hour
	// MaxStateValues bounds the integers and the reals of a state snapshot
	// (each; the scenario then checks the exact sizes).
	MaxStateValues = 1 << 16
	// MaxSightings bounds the sightings in one report.
	MaxSightings = 1 << 14
	// MaxName bounds fleet, sender, scenario, digest and guess source names.
	MaxName = 128
	// RoundWindow: a round start more than this many rounds ahead of the
	// current round is not believed (a run restarted by a new coordinator
	// must start within this many rounds of 1).
	RoundWindow = 256
	// ResyncAfter: this many consecutive round starts of one run that were
	// all refused as stale or too far ahead, with none accepted in between,
	// make a robot follow that run. One bad round start then costs at most
	// this many rounds.
	ResyncAfter = 3
	// History is how many past rounds a robot keeps for its local interface.
	History = 64
	// HelloGap: a robot re-sends its report at most once per this long.
	HelloGap = 200 * time.Millisecond
	// Repeats: on lossy links every message that a round cannot do without
	// is sent again until its receiver shows it arrived: the coordinator's
	// round start until every turn is in, its close until every report is
	// in; a robot's decision until the close, its report until the next
	// round starts. Copies go every quarter of the first turn's deadline
	// (at least RepeatMin; ReportRepeat before any round), at most
	// MaxRepeats times per message.
	RepeatMin    = time.Millisecond
	ReportRepeat = 50 * time.Millisecond
	MaxRepeats   = 32
)

// RepeatEvery is how often a round's messages are repeated, from its
// first turn's deadline.
func RepeatEvery(firstDeadline time.Duration) time.Duration {
	return max(firstDeadline/4, RepeatMin)
}

// Decide is the effort as decide takes it: a robot's own turn and
// recompute's guesses must use exactly the fleet's.
func (p Params) Decide() decide.Config {
	return decide.Config{Samples: int(p.Samples), Horizon: int(p.Horizon), TerminalCost: p.TerminalCost}
}

// CheckParams reports why p is over a bound, or "".
func CheckParams(p Params) string {
	switch {
	case p.Samples < 1 || p.Samples > MaxSamples:
		return fmt.Sprintf("samples %d outside 1..%d", p.Samples, MaxSamples)
	case p.Horizon < 0 || p.Horizon > MaxHorizon:
		return fmt.Sprintf("horizon %d outside 0..%d", p.Horizon, MaxHorizon)
	case uint64(p.Samples)*uint64(p.Horizon+1) > MaxSimSteps:
		return fmt.Sprintf("samples x (horizon+1) = %d over %d simulated steps per Q-factor",
			uint64(p.Samples)*uint64(p.Horizon+1), MaxSimSteps)
	}
	return ""
}

// DropReason classifies messages that were not acted on. Each has its own
// label in the daemons' dropped-message counters.
type DropReason string

const (
	DropMalformed    DropReason = "malformed"      // does not decode, or fields that contradict each other
	DropOversize     DropReason = "oversize"       // over MaxMessageBytes (counted by the shell, never decoded)
	DropBounds       DropReason = "out-of-bounds"  // a size or effort over its documented maximum
	DropRange        DropReason = "out-of-range"   // a robot id or control that does not exist
	DropForeign      DropReason = "foreign"        // another fleet's message
	DropScenario     DropReason = "wrong-scenario" // a round start for another scenario file or fleet size
	DropSubject      DropReason = "wrong-subject"  // the payload's robot is not the one its subject names
	DropStale        DropReason = "stale"          // a round that is over, or an older coordinator run
	DropFuture       DropReason = "future"         // a round beyond the freshness window, or not started
	DropDuplicate    DropReason = "duplicate"      // a second copy for the same round and robot
	DropNotInOrder   DropReason = "not-in-order"   // a robot that is not in this round's order
	DropTooFrequent  DropReason = "too-frequent"   // a report request within HelloGap of the last one answered
	DropContradicts  DropReason = "contradicts"    // a close that gives this robot a control it did not decide
	DropSlowConsumer DropReason = "slow-consumer"  // lost in the NATS client because the daemon fell behind
)

// Reasons lists every drop reason, for counters that start at zero.
func Reasons() []DropReason {
	return []DropReason{DropMalformed, DropOversize, DropBounds, DropRange, DropForeign, DropScenario,
		DropSubject, DropStale, DropFuture, DropDuplicate, DropNotInOrder, DropTooFrequent, DropContradicts, DropSlowConsumer}
}

// Drop reports a message that was not acted on, with why. Drivers count
// every drop and log the first of each (reason, sender).
type Drop struct {
	Reason DropReason
	Sender string // robot id or sender name when known, else ""
	Detail string
}

func (Drop) isAction() {}

// CheckDecision is the part of a decision's admission that robots and the
// coordinator share: fleet, sizes, the robot against the fleet and against
// the subject it came on. It returns the reason and why, or "".
func CheckDecision(d Decision, fleet string, robots, subject int) (DropReason, string) {
	switch {
	case d.Fleet != fleet:
		return DropForeign, fmt.Sprintf("decision for fleet %.64q, this is %q", d.Fleet, fleet)
	case len(d.Sender) > MaxName || len(d.Heard)+len(d.Guessed) > MaxRobots:
		return DropBounds, fmt.Sprintf("decision with a %d-byte sender and %d robots heard or guessed", len(d.Sender), len(d.Heard)+len(d.Guessed))
	case uint64(d.Robot) >= uint64(robots):
		return DropRange, fmt.Sprintf("robot %d is not below fleet size %d", d.Robot, robots)
	case subject != int(d.Robot):
		return DropSubject, fmt.Sprintf("decision of robot %d on robot %d's subject", d.Robot, subject)
	}
	return "", ""
}

// Who is a sender name fit for logs and counters: at most MaxName bytes.
func Who(sender string) string {
	if len(sender) > MaxName {
		return sender[:MaxName]
	}
	return sender
}

// names checks the strings a message carries against MaxName.
func names(ss ...string) string {
	for _, s := range ss {
		if len(s) > MaxName {
			return fmt.Sprintf("a name of %d bytes (max %d)", len(s), MaxName)
		}
	}
	return ""
}
