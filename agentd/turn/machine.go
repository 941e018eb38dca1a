package turn

import (
	"fmt"
	"math"
	"strconv"

	pb "baton/proto"

	"google.golang.org/protobuf/proto"
)

// Counters are what a machine has dropped, by reason, and how many valid
// predecessor decisions came too late to be used.
type Counters struct {
	Drops map[DropReason]uint64
	// Late: valid current-round decisions from a predecessor that arrived
	// after this robot had already asked to Compute. They are recorded but
	// not dropped: the message was fine, the link was slow.
	Late uint64
}

// Dropped is the total over all reasons.
func (c Counters) Dropped() uint64 {
	var n uint64
	for _, v := range c.Drops {
		n += v
	}
	return n
}

// phase is where this robot is in its turn for the current round.
type phase int

const (
	idle      phase = iota // no round yet, or sitting the round out
	waiting                // for predecessors (and maybe the armed timer)
	computing              // Compute asked, Computed not yet seen
	done                   // published
)

// early is a valid-looking decision for the next round, kept until that
// round's order and controls are known.
type early struct {
	robot   int
	control int32
}

// Machine is one robot's turn protocol. It is not safe for concurrent use;
// the driver serialises events.
type Machine struct {
	cfg Config

	round    uint64
	phase    phase
	mode     Mode
	order    []int
	pos      map[int]int // robot id -> index in order
	controls []int
	k        int         // own index in order (valid unless idle)
	heard    map[int]int // robot id -> control, current round
	armed    bool

	// What the Compute was asked with, so the Decision reports exactly the
	// inputs of the control it carries even if predecessors arrive later.
	heardAsk, guessAsk []uint32

	nextRound uint64 // round the buffer is for (0: empty)
	next      []early
	nextSeen  map[int]bool

	drops map[DropReason]uint64
	late  uint64
}

// New returns a machine that has seen no round yet.
func New(cfg Config) *Machine {
	return &Machine{cfg: cfg, drops: make(map[DropReason]uint64)}
}

// Round is the current round (0 before the first valid Round event).
func (m *Machine) Round() uint64 { return m.round }

// Counters returns a snapshot of the drop and late counts.
func (m *Machine) Counters() Counters {
	c := Counters{Drops: make(map[DropReason]uint64, len(m.drops)), Late: m.late}
	for r, n := range m.drops {
		c.Drops[r] = n
	}
	return c
}

// Step feeds one event and returns what the driver must do, in order.
// Unknown or nil events are ignored.
func (m *Machine) Step(ev Event) []Action {
	switch e := ev.(type) {
	case Round:
		return m.onRound(e)
	case *Round:
		if e != nil {
			return m.onRound(*e)
		}
	case Heard:
		return m.onHeard(e)
	case *Heard:
		if e != nil {
			return m.onHeard(*e)
		}
	case Timer:
		return m.onTimer(e)
	case *Timer:
		if e != nil {
			return m.onTimer(*e)
		}
	case Computed:
		return m.onComputed(e)
	case *Computed:
		if e != nil {
			return m.onComputed(*e)
		}
	}
	return nil
}

func (m *Machine) drop(r DropReason, sender, format string, args ...any) Drop {
	m.drops[r]++
	return Drop{Reason: r, Sender: sender, Detail: fmt.Sprintf(format, args...)}
}

func (m *Machine) onRound(e Round) []Action {
	switch {
	case e.Round == 0:
		// Rounds are numbered from 1; 0 is an unset field, not a replay.
		return []Action{m.drop(DropMalformed, "", "round 0: rounds start at 1")}
	case e.Round < m.round:
		return []Action{m.drop(DropStale, "", "round %d is before current round %d", e.Round, m.round)}
	case e.Round == m.round:
		return []Action{m.drop(DropDuplicate, "", "round %d already started", e.Round)}
	}
	if msg := m.checkRound(e); msg != "" {
		return []Action{m.drop(DropMalformed, "", "round %d: %s", e.Round, msg)}
	}

	// A newer round abandons whatever the old one was waiting for.
	m.round = e.Round
	m.mode = e.Mode
	m.order = append([]int(nil), e.Order...)
	m.controls = append([]int(nil), e.Controls...)
	m.pos = make(map[int]int, len(m.order))
	for i, r := range m.order {
		m.pos[r] = i
	}
	m.heard = make(map[int]int, len(m.order))
	m.armed = false
	m.heardAsk, m.guessAsk = nil, nil
	m.phase = idle
	m.k = 0

	var acts []Action
	buf, bufRound := m.next, m.nextRound
	m.next, m.nextSeen, m.nextRound = nil, nil, 0
	for _, b := range buf {
		if bufRound != e.Round {
			acts = append(acts, m.drop(DropStale, strconv.Itoa(b.robot),
				"decision buffered for round %d, but round %d started", bufRound, e.Round))
			continue
		}
		if d, ok := m.admit(b.robot, b.control); !ok {
			acts = append(acts, d)
			continue
		}
		m.heard[b.robot] = int(b.control)
	}

	k, in := m.pos[m.cfg.Robot]
	if !in {
		return acts // sit the round out: the driver holds
	}
	m.k = k
	switch {
	case m.mode == Parallel:
		acts = append(acts, m.compute(false))
	case m.allHeard():
		acts = append(acts, m.compute(true))
	case m.mode == Hybrid:
		m.phase, m.armed = waiting, true
		acts = append(acts, Arm{Round: m.round, At: e.Now + e.Deadlines[k-1]})
	default:
		m.phase = waiting
	}
	return acts
}

// checkRound returns why a Round is unusable, or "".
func (m *Machine) checkRound(e Round) string {
	if e.Mode != Sequential && e.Mode != Parallel && e.Mode != Hybrid {
		return fmt.Sprintf("mode %d is not sequential, parallel or hybrid", int(e.Mode))
	}
	if len(e.Deadlines) != len(e.Order) {
		return fmt.Sprintf("%d deadlines for %d turns", len(e.Deadlines), len(e.Order))
	}
	if len(e.Controls) != m.cfg.Robots {
		return fmt.Sprintf("%d control counts for %d robots", len(e.Controls), m.cfg.Robots)
	}
	for r, n := range e.Controls {
		if n < 0 {
			return fmt.Sprintf("controls[%d] = %d is negative", r, n)
		}
	}
	seen := make(map[int]bool, len(e.Order))
	for i, r := range e.Order {
		if r < 0 || r >= m.cfg.Robots {
			return fmt.Sprintf("order[%d] = robot %d is outside 0..%d", i, r, m.cfg.Robots-1)
		}
		if seen[r] {
			return fmt.Sprintf("robot %d appears twice in the order", r)
		}
		seen[r] = true
	}
	for i, d := range e.Deadlines {
		if d < 0 {
			return fmt.Sprintf("deadline %d is negative (%v)", i, d)
		}
		if i > 0 && d < e.Deadlines[i-1] {
			return fmt.Sprintf("deadline %d (%v) is before deadline %d (%v)", i, d, i-1, e.Deadlines[i-1])
		}
	}
	return ""
}

// admit checks a decision against the current round's order and controls.
func (m *Machine) admit(robot int, control int32) (Drop, bool) {
	sender := strconv.Itoa(robot)
	if _, in := m.pos[robot]; !in {
		return m.drop(DropNotInOrder, sender, "robot %d is not in the order of round %d", robot, m.round), false
	}
	if control < 0 || int(control) >= m.controls[robot] {
		return m.drop(DropMalformed, sender, "control %d is outside 0..%d for robot %d",
			control, m.controls[robot]-1, robot), false
	}
	return Drop{}, true
}

func (m *Machine) allHeard() bool {
	for _, p := range m.order[:m.k] {
		if _, ok := m.heard[p]; !ok {
			return false
		}
	}
	return true
}

// compute builds the Compute for the current round; useHeard is false in
// parallel mode, where every predecessor is guessed so the result does not
// depend on arrival timing.
func (m *Machine) compute(useHeard bool) Compute {
	known := make([]int, max(m.cfg.Robots, 0))
	for i := range known {
		known[i] = -1
	}
	var guess []int
	m.heardAsk, m.guessAsk = nil, nil
	for _, p := range m.order[:m.k] {
		if c, ok := m.heard[p]; ok && useHeard {
			known[p] = c
			m.heardAsk = append(m.heardAsk, uint32(p))
			continue
		}
		guess = append(guess, p)
		m.guessAsk = append(m.guessAsk, uint32(p))
	}
	m.phase, m.armed = computing, false
	return Compute{Round: m.round, Known: known, Guess: guess}
}

func (m *Machine) onHeard(e Heard) []Action {
	var d pb.Decision
	if err := proto.Unmarshal(e.Data, &d); err != nil {
		return []Action{m.drop(DropMalformed, "", "decision does not decode: %v", err)}
	}
	sender := strconv.FormatUint(uint64(d.Robot), 10)
	switch {
	case d.Fleet != m.cfg.Fleet:
		return []Action{m.drop(DropForeign, sender, "fleet %q is not %q", d.Fleet, m.cfg.Fleet)}
	case d.Round < m.round:
		return []Action{m.drop(DropStale, sender, "round %d is before current round %d", d.Round, m.round)}
	case d.Round == 0:
		// Only reachable before round 1: 0 is never a live round.
		return []Action{m.drop(DropStale, sender, "round 0 precedes round 1")}
	case d.Round-m.round > 1:
		return []Action{m.drop(DropFuture, sender, "round %d is more than one ahead of current round %d", d.Round, m.round)}
	case m.cfg.Robots <= 0 || uint64(d.Robot) >= uint64(m.cfg.Robots):
		return []Action{m.drop(DropMalformed, sender, "robot %d is not below fleet size %d", d.Robot, m.cfg.Robots)}
	}
	robot := int(d.Robot)
	if robot == m.cfg.Robot {
		if d.Sender == m.cfg.Sender {
			return nil // our own publication echoed back
		}
		return []Action{m.drop(DropDuplicate, sender, "another sender claims robot %d (sender %q, this robot is %q)",
			robot, d.Sender, m.cfg.Sender)}
	}

	if d.Round == m.round+1 {
		// Order and controls of that round are unknown yet: keep it and
		// check it when the round starts.
		if m.nextRound != d.Round {
			m.nextRound, m.next, m.nextSeen = d.Round, nil, make(map[int]bool)
		}
		if m.nextSeen[robot] {
			return []Action{m.drop(DropDuplicate, sender, "second decision from robot %d for round %d", robot, d.Round)}
		}
		m.nextSeen[robot] = true
		m.next = append(m.next, early{robot: robot, control: d.Control})
		return nil
	}

	// Current round.
	if drop, ok := m.admit(robot, d.Control); !ok {
		return []Action{drop}
	}
	if _, dup := m.heard[robot]; dup {
		return []Action{m.drop(DropDuplicate, sender, "second decision from robot %d for round %d", robot, d.Round)}
	}
	m.heard[robot] = int(d.Control)
	if m.phase == idle || m.pos[robot] >= m.k {
		return nil // a successor, or we sit out: recorded, nothing to do
	}
	switch m.phase {
	case waiting:
		if m.allHeard() {
			return []Action{m.compute(true)}
		}
	case computing, done:
		// In parallel mode nobody waits, so nothing can be late.
		if m.mode != Parallel {
			m.late++
		}
	}
	return nil
}

func (m *Machine) onTimer(e Timer) []Action {
	if e.Round != m.round || m.phase != waiting || !m.armed {
		return nil
	}
	return []Action{m.compute(true)}
}

func (m *Machine) onComputed(e Computed) []Action {
	if e.Round != m.round || m.phase != computing {
		return nil
	}
	if e.Control < 0 || e.Control > math.MaxInt32 {
		// Stay computing: a corrected Computed for this round may follow.
		return []Action{m.drop(DropMalformed, strconv.Itoa(m.cfg.Robot),
			"computed control %d for round %d is not a valid control", e.Control, e.Round)}
	}
	var us uint64
	if e.Took > 0 {
		us = uint64(e.Took.Microseconds())
	}
	m.phase = done
	return []Action{Publish{Decision: &pb.Decision{
		Fleet:     m.cfg.Fleet,
		Round:     m.round,
		Robot:     uint32(m.cfg.Robot),
		Control:   int32(e.Control),
		Heard:     m.heardAsk,
		Guessed:   m.guessAsk,
		ComputeUs: us,
		Sender:    m.cfg.Sender,
	}}}
}

// Late is Counters().Late without copying the drop map (drivers poll it
// after every step).
func (m *Machine) Late() uint64 { return m.late }
