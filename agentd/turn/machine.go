package turn

import (
	"fmt"
	"math"
	"slices"
	"strconv"
	"time"

	"baton/sim/model"
)

// Counters are what a machine has dropped, by reason, how many valid
// predecessor decisions came too late to be used, and how often it switched
// runs because the one it followed went quiet (ResyncAfter).
type Counters struct {
	Drops   map[DropReason]uint64
	Late    uint64
	Resyncs uint64
	// Repeats: copies of starts, decisions and closes already had.
	Repeats uint64
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
	idle      phase = iota // no round yet, sitting the round out, or the round closed first
	waiting                // for predecessors (and maybe the armed timer)
	computing              // Compute asked, Computed not yet seen
	done                   // published
)

// current is the round being played, as admitted.
type current struct {
	round     uint64
	at        time.Duration // when its start was admitted
	mode      Mode
	order     []int
	pos       []int // robot id -> index in order, -1 when not in it
	deadlines []time.Duration
	x         model.State // never modified once admitted: Compute hands it out
	params    Params
	guess     string
	model     uint64
}

// entry is one round as the robot's local interface shows it.
type entry struct {
	x        model.State
	controls []int // valid controls per robot in x, to check the close
	inOrder  bool
	decided  bool
	control  int
	heard    []uint32
	guessed  []uint32
	closed   bool
	closeCtl int
	held     bool
	latency  uint64
	stalled  int // robot id, -1: none
}

// noEarly and earlyConflict mark, in next, a robot with no decision kept
// and one with two different ones (values no int32 control can take).
const (
	noEarly       = math.MinInt64
	earlyConflict = math.MinInt64 + 1
)

// conflicted marks, in heard, a robot for which two different decisions
// came this round: neither is used, the robot is guessed as if unheard.
// The bus cannot tell a forged decision from a real one; this way a
// forger can cost a guess but never choose a predecessor's control.
const conflicted = -2

// Machine is one robot's side of the round protocol. It is not safe for
// concurrent use; the driver serialises calls.
type Machine struct {
	cfg    Config
	robots int

	following bool   // a run has been admitted
	epoch     uint64 // the run followed
	cur       current
	lastAt    time.Duration // when the current round's start was admitted
	phase     phase
	k         int   // own index in the order (valid unless idle)
	heard     []int // robot id -> heard control this round, -1: none
	// What the Compute was asked with, so the Decision reports exactly the
	// inputs of the control it carries even if predecessors arrive later.
	heardAsk, guessAsk []uint32

	hist map[uint64]*entry // rounds of the followed run, the last History

	// Decisions for one round not started yet, (nextEpoch, nextRound): per
	// robot its control, noEarly or earlyConflict.
	nextEpoch, nextRound uint64
	next                 []int64

	// A run whose round starts keep being refused (see ResyncAfter).
	candEpoch, candRound uint64
	candCount            int

	refusal string // why the latest wrong-scenario round start was refused

	lastCtl      []int // the controls of round lastCtlRound as closed, -1 held
	lastCtlRound uint64

	report   *Report // the robot's latest report, re-sent when asked
	resentAt time.Duration
	resent   bool

	// Repeats (see RepeatEvery): the decision published this round and
	// how many copies of it and of the report went out.
	pub                    *Decision
	pubRepeats, repRepeats int
	repeats                uint64 // repeated copies received and ignored
	// missed: the next round closed before its start got here (every
	// copy lost), so the robot's software need not wait for it.
	missed uint64

	drops   map[DropReason]uint64
	late    uint64
	resyncs uint64
}

// New returns a machine that follows no run yet.
func New(cfg Config) *Machine {
	if cfg.Stale <= 0 {
		cfg.Stale = 10 * time.Second
	}
	robots := 0
	if cfg.Model != nil {
		robots = cfg.Model.Robots()
	}
	m := &Machine{cfg: cfg, robots: robots, drops: make(map[DropReason]uint64),
		hist: make(map[uint64]*entry), heard: make([]int, robots), next: make([]int64, robots),
		lastCtl: make([]int, robots)}
	m.clearNext(0, 0)
	return m
}

// Round is the current round (0 before the first admitted round start).
func (m *Machine) Round() uint64 { return m.cur.round }

// Epoch is the coordinator run followed (0 before any).
func (m *Machine) Epoch() uint64 { return m.epoch }

// Counters returns a snapshot of the drop, late and resync counts.
func (m *Machine) Counters() Counters {
	c := Counters{Drops: make(map[DropReason]uint64, len(m.drops)), Late: m.late, Resyncs: m.resyncs, Repeats: m.repeats}
	for r, n := range m.drops {
		c.Drops[r] = n
	}
	return c
}

// Step feeds one event and returns what the driver must do, in order.
// Unknown events are ignored.
func (m *Machine) Step(ev Event) []Action {
	switch e := ev.(type) {
	case GotStart:
		return m.onStart(e)
	case GotDecision:
		return m.onDecision(e)
	case GotClose:
		return m.onClose(e)
	case GotHello:
		return m.onHello(e)
	case Timer:
		return m.onTimer(e)
	case Computed:
		return m.onComputed(e)
	}
	return nil
}

func (m *Machine) drop(r DropReason, sender, format string, args ...any) []Action {
	m.drops[r]++
	return []Action{Drop{Reason: r, Sender: sender, Detail: fmt.Sprintf(format, args...)}}
}

// ---- round starts ----

func (m *Machine) onStart(e GotStart) []Action {
	s := e.Msg
	who := Who(s.Sender)
	switch {
	case s.Fleet != m.cfg.Fleet:
		return m.drop(DropForeign, who, "round start for fleet %.64q, this is %q", s.Fleet, m.cfg.Fleet)
	case names(s.Sender, s.Scenario, s.Digest, s.Guess) != "":
		return m.drop(DropBounds, who, "round start with %s", names(s.Sender, s.Scenario, s.Digest, s.Guess))
	case m.cfg.Digest != "" && s.Digest != m.cfg.Digest:
		m.refusal = fmt.Sprintf("refusing rounds: round %d was started on scenario digest %q, this robot runs %s; "+
			"start both with the same scenario file and --robots", s.Round, s.Digest, m.cfg.Digest)
		return m.drop(DropScenario, who, "%s", m.refusal)
	case s.Round == 0:
		return m.drop(DropMalformed, who, "round 0: rounds start at 1")
	}
	if m.following && s.Epoch == m.epoch && s.Round == m.cur.round && s.AgeUs > 0 {
		m.repeats++ // a repeat of the round in play: it arrived before
		return nil
	}
	cur, reason, why := m.checkStart(s)
	if reason != "" {
		return m.drop(reason, who, "round %d: %s", s.Round, why)
	}
	newRun, resync, d := m.fresh(s)
	if d != nil {
		return []Action{*d}
	}
	// A repeat heard first: the round began AgeUs before it was sent.
	cur.at = e.Now - time.Duration(min(s.AgeUs, uint64(MaxDeadline/time.Microsecond)))*time.Microsecond
	return m.begin(cur, s, newRun, resync)
}

// checkStart admits a round start's content: everything but freshness.
func (m *Machine) checkStart(s Start) (current, DropReason, string) {
	var c current
	if s.Mode != Sequential && s.Mode != Parallel && s.Mode != Hybrid {
		return c, DropMalformed, fmt.Sprintf("mode %d is not sequential, parallel or hybrid", int(s.Mode))
	}
	if why := CheckParams(s.Params); why != "" {
		return c, DropBounds, why
	}
	if len(s.Order) > MaxRobots || len(s.Ints) > MaxStateValues || len(s.Reals) > MaxStateValues {
		return c, DropBounds, fmt.Sprintf("an order of %d, a state of %d+%d values (max %d robots, %d values each)",
			len(s.Order), len(s.Ints), len(s.Reals), MaxRobots, MaxStateValues)
	}
	if len(s.Order) == 0 {
		return c, DropMalformed, "empty order"
	}
	if len(s.DeadlinesUs) != len(s.Order) {
		return c, DropMalformed, fmt.Sprintf("%d deadlines for %d turns", len(s.DeadlinesUs), len(s.Order))
	}
	c.pos = make([]int, m.robots)
	for i := range c.pos {
		c.pos[i] = -1
	}
	c.order = make([]int, len(s.Order))
	for i, r := range s.Order {
		if uint64(r) >= uint64(m.robots) {
			return c, DropRange, fmt.Sprintf("order[%d] = robot %d is outside 0..%d", i, r, m.robots-1)
		}
		if c.pos[r] >= 0 {
			return c, DropMalformed, fmt.Sprintf("robot %d appears twice in the order", r)
		}
		c.pos[r] = i
		c.order[i] = int(r)
	}
	c.deadlines = make([]time.Duration, len(s.DeadlinesUs))
	for i, d := range s.DeadlinesUs {
		if d > uint64(MaxDeadline/time.Microsecond) {
			return c, DropBounds, fmt.Sprintf("deadline %d is %dus, over %s", i, d, MaxDeadline)
		}
		c.deadlines[i] = time.Duration(d) * time.Microsecond
		if i > 0 && c.deadlines[i] < c.deadlines[i-1] {
			return c, DropMalformed, fmt.Sprintf("deadline %d (%v) is before deadline %d (%v)", i, c.deadlines[i], i-1, c.deadlines[i-1])
		}
	}
	mdl := m.cfg.Model
	if s.Scenario != mdl.Name() {
		return c, DropScenario, fmt.Sprintf("a snapshot of scenario %q, this robot runs %q", s.Scenario, mdl.Name())
	}
	x := mdl.NewState()
	if err := mdl.Unflatten(x, s.Ints, s.Reals); err != nil {
		return c, DropMalformed, err.Error()
	}
	c.round, c.mode, c.x, c.params, c.guess, c.model = s.Round, s.Mode, x, s.Params, s.Guess, s.ModelVersion
	return c, "", ""
}

// fresh decides whether a round start is believed: it continues the run
// followed (within RoundWindow), starts a newer run near round 1 or near
// the round followed (a restarted coordinator continues the numbering from
// its durable log), or its run has kept coming while the one followed went
// quiet (ResyncAfter).
func (m *Machine) fresh(s Start) (newRun, resync bool, d *Drop) {
	if !m.following {
		return true, false, nil
	}
	var reason DropReason
	var why string
	switch {
	case s.Epoch == m.epoch && s.Round == m.cur.round:
		m.drops[DropDuplicate]++
		return false, false, &Drop{Reason: DropDuplicate, Sender: Who(s.Sender), Detail: fmt.Sprintf("round %d already started", s.Round)}
	case s.Epoch == m.epoch && s.Round < m.cur.round:
		reason, why = DropStale, fmt.Sprintf("round %d is before current round %d", s.Round, m.cur.round)
	case s.Epoch == m.epoch && s.Round-m.cur.round > RoundWindow:
		reason, why = DropFuture, fmt.Sprintf("round %d is more than %d rounds ahead of current round %d", s.Round, RoundWindow, m.cur.round)
	case s.Epoch == m.epoch:
		return false, false, nil
	case s.Epoch > m.epoch && (s.Round <= RoundWindow || s.Round <= m.cur.round+RoundWindow):
		return true, false, nil
	case s.Epoch > m.epoch:
		reason, why = DropFuture, fmt.Sprintf("a new coordinator run (epoch %d) at round %d: runs start at round 1 or continue near the round followed (%d)", s.Epoch, s.Round, m.cur.round)
	default:
		reason, why = DropStale, fmt.Sprintf("epoch %d is an older coordinator run than %d", s.Epoch, m.epoch)
	}
	if m.candCount > 0 && s.Epoch == m.candEpoch && s.Round == m.candRound+1 {
		m.candCount++
	} else {
		m.candCount = 1
	}
	m.candEpoch, m.candRound = s.Epoch, s.Round
	if m.candCount >= ResyncAfter {
		m.resyncs++
		return s.Epoch != m.epoch, true, nil
	}
	m.drops[reason]++
	return false, false, &Drop{Reason: reason, Sender: Who(s.Sender), Detail: why}
}

func (m *Machine) begin(c current, s Start, newRun, resync bool) []Action {
	var acts []Action
	if resync {
		acts = append(acts, Note{Warn: true, Text: fmt.Sprintf(
			"following round %d of run %d: %d of its round starts in a row were refused while the round %d followed went quiet",
			c.round, s.Epoch, ResyncAfter, m.cur.round)})
	}
	if newRun {
		if m.following && !resync {
			acts = append(acts, Note{Text: fmt.Sprintf("a new coordinator run (epoch %d, round %d) replaces run %d at round %d; starting over with its rounds",
				s.Epoch, c.round, m.epoch, m.cur.round)})
		}
		m.epoch, m.following = s.Epoch, true
		clear(m.hist)
		m.lastCtlRound = 0
	}
	m.candCount = 0
	m.cur = c
	m.lastAt = c.at
	m.refusal = ""
	for r := range m.heard {
		m.heard[r] = -1
	}
	m.heardAsk, m.guessAsk, m.phase, m.k = nil, nil, idle, 0
	m.pub, m.pubRepeats = nil, 0
	// Keep the last History rounds; after a resync backwards, drop the
	// rounds "ahead" that the bad start made.
	for r := range m.hist {
		if r+History <= c.round || r >= c.round {
			delete(m.hist, r)
		}
	}
	controls := make([]int, m.robots)
	for r := range controls {
		controls[r] = m.cfg.Model.NumControls(c.x, r)
	}
	k := c.pos[m.cfg.Robot]
	m.hist[c.round] = &entry{x: c.x, controls: controls, inOrder: k >= 0, stalled: -1}
	acts = append(acts, Began{Epoch: m.epoch, Round: c.round, NewRun: newRun, ModelVersion: c.model, Resync: resync})

	// Decisions that came before their round's start.
	match := m.nextEpoch == m.epoch && m.nextRound == c.round
	for robot, ctl := range m.next {
		switch {
		case ctl == noEarly:
		case !match:
			acts = append(acts, m.drop(DropStale, strconv.Itoa(robot), "decision kept for a round that did not start; round %d started", c.round)...)
		case ctl == earlyConflict:
			m.heard[robot] = conflicted
		default:
			if d := m.admit(robot, int32(ctl)); d != nil {
				acts = append(acts, d...)
			} else {
				m.heard[robot] = int(ctl)
			}
		}
	}
	m.clearNext(0, 0)

	if k < 0 {
		return acts // sit the round out: the robot holds
	}
	m.k = k
	switch {
	case c.mode == Parallel:
		acts = append(acts, m.compute(false))
	case m.allHeard():
		acts = append(acts, m.compute(true))
	case c.mode == Hybrid:
		m.phase = waiting
		acts = append(acts, Arm{Epoch: m.epoch, Round: c.round, At: c.at + c.deadlines[k-1]})
	default:
		m.phase = waiting
	}
	return acts
}

// admit checks a decision against the current round's order and controls.
func (m *Machine) admit(robot int, control int32) []Action {
	sender := strconv.Itoa(robot)
	if m.cur.pos[robot] < 0 {
		return m.drop(DropNotInOrder, sender, "robot %d is not in the order of round %d", robot, m.cur.round)
	}
	if n := m.hist[m.cur.round].controls[robot]; control < 0 || int(control) >= n {
		return m.drop(DropRange, sender, "control %d is outside 0..%d for robot %d", control, n-1, robot)
	}
	return nil
}

func (m *Machine) allHeard() bool {
	for _, p := range m.cur.order[:m.k] {
		if m.heard[p] < 0 {
			return false
		}
	}
	return true
}

// compute builds the Compute for the current round; useHeard is false in
// parallel mode, where every predecessor is guessed so the result does not
// depend on arrival timing.
func (m *Machine) compute(useHeard bool) Compute {
	known := make([]int, m.robots)
	for i := range known {
		known[i] = -1
	}
	var guess []int
	m.heardAsk, m.guessAsk = nil, nil
	for _, p := range m.cur.order[:m.k] {
		if c := m.heard[p]; c >= 0 && useHeard {
			known[p] = c
			m.heardAsk = append(m.heardAsk, uint32(p))
			continue
		}
		guess = append(guess, p)
		m.guessAsk = append(m.guessAsk, uint32(p))
	}
	m.phase = computing
	var last []int
	if m.lastCtlRound != 0 && m.lastCtlRound+1 == m.cur.round {
		last = slices.Clone(m.lastCtl)
	}
	return Compute{Epoch: m.epoch, Round: m.cur.round, Known: known, Guess: guess, State: m.cur.x, Params: m.cur.params,
		Order: m.cur.order, GuessSource: m.cur.guess, Last: last, Due: m.cur.at + m.cur.deadlines[m.k]}
}

// ---- decisions ----

func (m *Machine) onDecision(e GotDecision) []Action {
	d := e.Msg
	sender := strconv.FormatUint(uint64(d.Robot), 10)
	if reason, why := CheckDecision(d, m.cfg.Fleet, m.robots, e.Subject); reason != "" {
		return m.drop(reason, sender, "%s", why)
	}
	robot := int(d.Robot)
	if robot == m.cfg.Robot {
		if d.Sender == m.cfg.Sender {
			return nil // our own publication echoed back
		}
		return m.drop(DropDuplicate, sender, "another sender claims robot %d (sender %.64q, this robot is %q)", robot, d.Sender, m.cfg.Sender)
	}
	if !m.following || d.Epoch != m.epoch || d.Round != m.cur.round {
		return m.onOtherRound(d, robot, sender)
	}
	if acts := m.admit(robot, d.Control); acts != nil {
		return acts
	}
	switch h := m.heard[robot]; {
	case h == int(d.Control) || h == conflicted:
		m.repeats++ // robots repeat their decisions until the close
		return nil
	case h >= 0:
		// Two different decisions for one robot: one is forged. Use
		// neither, unless this robot already decided with the first.
		used := m.phase != idle && m.phase != waiting && m.cur.pos[robot] < m.k
		if !used {
			m.heard[robot] = conflicted
		}
		return m.drop(DropDuplicate, sender, "robot %d sent control %d and then %d for round %d: neither is used (one is not the robot's)", robot, h, d.Control, d.Round)
	}
	m.heard[robot] = int(d.Control)
	if m.phase == idle || m.cur.pos[robot] >= m.k {
		return nil // a successor, or we sit out: recorded, nothing to do
	}
	switch m.phase {
	case waiting:
		if m.allHeard() {
			return []Action{m.compute(true)}
		}
	case computing, done:
		// In parallel mode nobody waits, so nothing can be late.
		if m.cur.mode != Parallel {
			m.late++
			return []Action{Late{Robot: robot}}
		}
	}
	return nil
}

// onOtherRound handles a decision that is not for the current round: kept
// when it is for the round about to start (the next round of this run, or
// a newer run's round 1 or a round that continues the numbering), else
// dropped.
func (m *Machine) onOtherRound(d Decision, robot int, sender string) []Action {
	switch {
	case d.Round == 0:
		return m.drop(DropMalformed, sender, "round 0: rounds start at 1")
	case !m.following:
	case d.Epoch == m.epoch && d.Round < m.cur.round, d.Epoch < m.epoch:
		return m.drop(DropStale, sender, "decision for round %d of run %d; current is round %d of run %d", d.Round, d.Epoch, m.cur.round, m.epoch)
	case d.Epoch == m.epoch && d.Round == m.cur.round+1, d.Epoch > m.epoch && (d.Round == 1 || d.Round == m.cur.round || d.Round == m.cur.round+1):
	default:
		return m.drop(DropFuture, sender, "decision for round %d of run %d; current is round %d of run %d", d.Round, d.Epoch, m.cur.round, m.epoch)
	}
	var acts []Action
	if m.nextEpoch != d.Epoch || m.nextRound != d.Round {
		for r, ctl := range m.next {
			if ctl != noEarly {
				acts = append(acts, m.drop(DropStale, strconv.Itoa(r), "decision kept for round %d replaced by one for round %d", m.nextRound, d.Round)...)
			}
		}
		m.clearNext(d.Epoch, d.Round)
	}
	switch had := m.next[robot]; {
	case had == noEarly:
		m.next[robot] = int64(d.Control)
	case had == int64(d.Control) || had == earlyConflict:
		m.repeats++
	default:
		m.next[robot] = earlyConflict
		acts = append(acts, m.drop(DropDuplicate, sender, "robot %d sent control %d and then %d for round %d: neither is used (one is not the robot's)", robot, had, d.Control, d.Round)...)
	}
	return acts
}

// clearNext empties the kept decisions and sets the round they are for.
func (m *Machine) clearNext(epoch, round uint64) {
	for r := range m.next {
		m.next[r] = noEarly
	}
	m.nextEpoch, m.nextRound = epoch, round
}

func (m *Machine) onTimer(e Timer) []Action {
	switch e.Kind {
	case RepeatDecision:
		return m.repeatDecision(e)
	case RepeatReport:
		return m.repeatReport(e)
	}
	// Only a hybrid wait has a deadline; a sequential one waits for its
	// predecessors or the close.
	if !m.following || e.Epoch != m.epoch || e.Round != m.cur.round || m.phase != waiting || m.cur.mode != Hybrid {
		return nil
	}
	return []Action{m.compute(true)}
}

func (m *Machine) onComputed(e Computed) []Action {
	if !m.following || e.Epoch != m.epoch || e.Round != m.cur.round || m.phase != computing {
		return nil
	}
	ent := m.hist[m.cur.round]
	if e.Control < 0 || e.Control > math.MaxInt32 || e.Control >= ent.controls[m.cfg.Robot] {
		m.phase = idle
		return []Action{Note{Warn: true, Text: fmt.Sprintf("round %d: the rollout produced control %d, outside 0..%d; holding",
			e.Round, e.Control, ent.controls[m.cfg.Robot]-1)}}
	}
	m.phase = done
	if ent.closed {
		return nil // the round closed while this robot computed: nothing to send
	}
	var us uint64
	if e.Took > 0 {
		us = uint64(e.Took / time.Microsecond)
	}
	ent.decided, ent.control, ent.heard, ent.guessed = true, e.Control, m.heardAsk, m.guessAsk
	d := Decision{
		Fleet: m.cfg.Fleet, Epoch: m.epoch, Round: m.cur.round, Robot: uint32(m.cfg.Robot), Control: int32(e.Control),
		Heard: m.heardAsk, Guessed: m.guessAsk, ComputeUs: us, Sender: m.cfg.Sender,
	}
	m.pub, m.pubRepeats = &d, 0
	return []Action{Publish{Decision: d, Mode: m.cur.mode, Since: e.Now - m.cur.at},
		Arm{Epoch: m.epoch, Round: m.cur.round, Kind: RepeatDecision, At: e.Now + m.repeatEvery()}}
}

func (m *Machine) repeatEvery() time.Duration {
	if !m.following || len(m.cur.deadlines) == 0 {
		return ReportRepeat
	}
	return RepeatEvery(m.cur.deadlines[0])
}

// repeatDecision sends this round's decision again while no close came.
func (m *Machine) repeatDecision(e Timer) []Action {
	if !m.following || e.Epoch != m.epoch || e.Round != m.cur.round || m.pub == nil || m.pubRepeats >= MaxRepeats {
		return nil
	}
	if ent := m.hist[m.cur.round]; ent == nil || ent.closed {
		return nil
	}
	m.pubRepeats++
	return []Action{Publish{Decision: *m.pub, Mode: m.cur.mode, Since: e.Now - m.cur.at, Repeat: true},
		Arm{Epoch: m.epoch, Round: m.cur.round, Kind: RepeatDecision, At: e.Now + m.repeatEvery()}}
}

// repeatReport sends the latest report again until a round after it
// starts (or a newer run does).
func (m *Machine) repeatReport(e Timer) []Action {
	r := m.report
	if r == nil || r.Epoch != e.Epoch || r.Round != e.Round || m.repRepeats >= MaxRepeats {
		return nil
	}
	if m.following && (m.epoch != r.Epoch || m.cur.round > r.Round) {
		return nil // the coordinator moved on: it has it, or did without
	}
	m.repRepeats++
	return []Action{SendReport{Report: *r, Resent: true},
		Arm{Epoch: r.Epoch, Round: r.Round, Kind: RepeatReport, At: e.Now + m.repeatEvery()}}
}

// ---- closes ----

func (m *Machine) onClose(e GotClose) []Action {
	c := e.Msg
	who := Who(c.Sender)
	switch {
	case c.Fleet != m.cfg.Fleet:
		return m.drop(DropForeign, who, "round close for fleet %.64q, this is %q", c.Fleet, m.cfg.Fleet)
	case len(c.Sender) > MaxName || len(c.Controls) > MaxRobots || len(c.Held) > MaxRobots:
		return m.drop(DropBounds, who, "round close with a %d-byte sender, %d controls, %d held", len(c.Sender), len(c.Controls), len(c.Held))
	case !m.following:
		return m.drop(DropFuture, who, "close of round %d before any round started here", c.Round)
	case c.Epoch < m.epoch:
		return m.drop(DropStale, who, "close from an older coordinator run (epoch %d, following %d)", c.Epoch, m.epoch)
	case c.Epoch == m.epoch && c.Round == m.cur.round+1:
		// The start of this round never got here, and it is over: the
		// robot held through it. Nothing in the close is used.
		m.missed = c.Round
		return nil
	case c.Epoch > m.epoch || c.Round > m.cur.round:
		return m.drop(DropFuture, who, "close of round %d of run %d, which has not started here (current: round %d of run %d)", c.Round, c.Epoch, m.cur.round, m.epoch)
	}
	ent := m.hist[c.Round]
	switch {
	case ent == nil:
		return m.drop(DropStale, who, "close of round %d, which is over (current round %d)", c.Round, m.cur.round)
	case len(c.Controls) != m.robots:
		return m.drop(DropMalformed, who, "round close with %d controls for %d robots", len(c.Controls), m.robots)
	case c.LatencyUs > uint64(MaxLatency/time.Microsecond):
		return m.drop(DropBounds, who, "round latency %dus is over %s", c.LatencyUs, MaxLatency)
	case c.Stalled > uint32(m.robots):
		return m.drop(DropRange, who, "stalled robot %d is outside 0..%d", int64(c.Stalled)-1, m.robots-1)
	}
	for r, ctl := range c.Controls {
		if ctl < 0 || int(ctl) >= ent.controls[r] {
			return m.drop(DropRange, who, "round %d: control %d for robot %d is outside 0..%d", c.Round, ctl, r, ent.controls[r]-1)
		}
	}
	held := make([]bool, m.robots)
	for _, h := range c.Held {
		if uint64(h) >= uint64(m.robots) {
			return m.drop(DropRange, who, "held robot %d is outside 0..%d", h, m.robots-1)
		}
		if held[h] {
			return m.drop(DropMalformed, who, "robot %d listed twice as held", h)
		}
		held[h] = true
	}
	if ent.closed {
		if ent.closeCtl == int(c.Controls[m.cfg.Robot]) && ent.held == held[m.cfg.Robot] {
			m.repeats++ // the coordinator repeats closes until it has every report
			return nil
		}
		return m.drop(DropDuplicate, who, "round %d already closed", c.Round)
	}
	if own := m.cfg.Robot; !held[own] && (!ent.decided || ent.control != int(c.Controls[own])) {
		// The coordinator takes a robot's control only from its decision:
		// a close that says otherwise is not the coordinator's, and a
		// robot never acts on a control it did not decide.
		if !ent.decided {
			return m.drop(DropContradicts, who, "round %d: the close gives this robot control %d, but it decided nothing", c.Round, c.Controls[own])
		}
		return m.drop(DropContradicts, who, "round %d: the close gives this robot control %d, but it decided %d", c.Round, c.Controls[own], ent.control)
	}
	ent.closed, ent.closeCtl, ent.held, ent.latency = true, int(c.Controls[m.cfg.Robot]), held[m.cfg.Robot], c.LatencyUs
	ent.stalled = int(c.Stalled) - 1
	if c.Round >= m.lastCtlRound {
		for r, ctl := range c.Controls {
			m.lastCtl[r] = int(ctl)
			if held[r] {
				m.lastCtl[r] = -1 // held: it decided nothing
			}
		}
		m.lastCtlRound = c.Round
	}
	if c.Round == m.cur.round && m.phase == waiting {
		m.phase = idle // the round is over: stop waiting
	}
	return nil
}

// ---- reports ----

func (m *Machine) onHello(e GotHello) []Action {
	h := e.Msg
	who := Who(h.Sender)
	switch {
	case h.Fleet != m.cfg.Fleet:
		return m.drop(DropForeign, who, "report request for fleet %.64q, this is %q", h.Fleet, m.cfg.Fleet)
	case len(h.Sender) > MaxName:
		return m.drop(DropBounds, who, "report request with a %d-byte sender", len(h.Sender))
	case m.following && h.Epoch < m.epoch:
		return m.drop(DropStale, who, "report request from an older coordinator run (epoch %d, following %d)", h.Epoch, m.epoch)
	case m.resent && e.Now-m.resentAt < HelloGap:
		return m.drop(DropTooFrequent, who, "report re-sent %v ago", e.Now-m.resentAt)
	case m.report == nil:
		return nil // nothing reported yet: the robot's software will
	}
	m.resent, m.resentAt = true, e.Now
	return []Action{SendReport{Report: *m.report, Resent: true}}
}

// Observe checks a report from the robot's own software (what it carried
// out and saw) and returns what to do: send it, and arm its repeat; the
// machine keeps it to re-send when a coordinator asks. Errors name what is
// wrong with the report.
func (m *Machine) Observe(now time.Duration, round uint64, position int32, applied int, seen []model.Sighting) ([]Action, error) {
	s, err := m.observe(round, position, applied, seen)
	if err != nil {
		return nil, err
	}
	m.repRepeats = 0
	return []Action{s, Arm{Epoch: s.Report.Epoch, Round: s.Report.Round, Kind: RepeatReport, At: now + m.repeatEvery()}}, nil
}

func (m *Machine) observe(round uint64, position int32, applied int, seen []model.Sighting) (SendReport, error) {
	mdl := m.cfg.Model
	switch {
	case len(seen) > MaxSightings:
		return SendReport{}, fmt.Errorf("%d sightings, more than %d", len(seen), MaxSightings)
	case m.following && round != 0 && (round > m.cur.round || round+1 < m.cur.round):
		// A report is about the round just carried out; one round behind
		// is a race with the next start, anything else a wrong counter.
		return SendReport{}, fmt.Errorf("report for round %d, but the current round is %d", round, m.cur.round)
	case applied < 0 || applied >= mdl.MaxControls():
		return SendReport{}, fmt.Errorf("applied control %d is not one of 0..%d", applied, mdl.MaxControls()-1)
	}
	scratch := mdl.NewState()
	if m.following {
		mdl.CopyState(scratch, m.cur.x)
	} else {
		mdl.Start(scratch, model.NewRNG(0).Rand)
	}
	if err := mdl.Absorb(scratch, m.cfg.Robot, position, seen); err != nil {
		return SendReport{}, err
	}
	rep := Report{Fleet: m.cfg.Fleet, Epoch: m.epoch, Round: round, Robot: uint32(m.cfg.Robot), Position: position,
		Applied: int32(applied), Seen: slices.Clone(seen), Sender: m.cfg.Sender}
	m.report = &rep
	return SendReport{Report: rep}, nil
}

// ---- what the robot's software sees ----

// View is what the robot's own software sees of a round.
type View struct {
	Round   uint64
	Epoch   uint64
	Control int
	Action  string
	Hold    bool
	Reason  string // why it holds, or why it would if the wait ended now
	Heard   []uint32
	Guessed []uint32
	Decided bool
	Closed  bool
	// LatencyUs is the coordinator's measure of the whole round, once closed.
	LatencyUs uint64
	// Stalled is the robot a sequential round waited for in vain (-1: none).
	Stalled int
	// Done: this is the answer (a decision, the close when asked for it, or
	// a hold that waiting cannot change). Otherwise the robot's software
	// may wait; if the wait ends first, it holds for Reason.
	Done bool
}

// View returns round's view (0: the current round) at time now; with
// closed the answer waits for the round's close. Nothing old is ever served
// as something to do: a decision is good only while its round is the
// current one and its start is younger than Stale.
func (m *Machine) View(now time.Duration, round uint64, closed bool) View {
	if round == 0 {
		round = m.cur.round
	}
	v := View{Round: round, Epoch: m.epoch, Heard: []uint32{}, Guessed: []uint32{}, Stalled: -1}
	hold := func(done bool, format string, args ...any) View {
		v.Hold, v.Done, v.Reason = true, done, fmt.Sprintf(format, args...)
		v.Control, v.Action = 0, m.controlName(v.Round, 0)
		return v
	}
	if !m.following {
		if m.refusal != "" {
			return hold(true, "%s", m.refusal)
		}
		return hold(false, "no round started here yet (coordinator not up, or not reachable?)")
	}
	ent := m.hist[round]
	if ent == nil {
		if round == m.missed && round == m.cur.round+1 {
			return hold(true, "round %d closed before its start got here (lost on the way)", round)
		}
		if round > m.cur.round {
			return hold(false, "round %d has not started here (current round %d)", round, m.cur.round)
		}
		return hold(true, "round %d is over; the current round is %d", round, m.cur.round)
	}
	if ent.closed {
		v.Closed, v.LatencyUs, v.Stalled = true, ent.latency, ent.stalled
	}
	v.Decided = ent.decided
	if ent.decided {
		v.Heard, v.Guessed = orEmpty(ent.heard), orEmpty(ent.guessed)
	}
	switch {
	case round < m.cur.round:
		return hold(true, "round %d is over; the current round is %d", round, m.cur.round)
	case now-m.lastAt > m.cfg.Stale:
		if m.refusal != "" {
			return hold(true, "%s", m.refusal)
		}
		return hold(true, "round %d started over %s ago and no round since (coordinator gone?)", round, m.cfg.Stale)
	case ent.closed && !ent.inOrder:
		return hold(true, "not in this round's order")
	case ent.closed && ent.held:
		if ent.stalled >= 0 && ent.stalled != m.cfg.Robot {
			return hold(true, "round closed without this robot's decision: the sequential round waited for robot %d", ent.stalled)
		}
		return hold(true, "round closed without this robot's decision")
	case ent.closed:
		v.Control, v.Done = ent.closeCtl, true
	case !ent.inOrder:
		return hold(!closed, "not in this round's order")
	case ent.decided && !closed:
		v.Control, v.Done = ent.control, true
	case ent.decided:
		v.Control = ent.control
		v.Reason = fmt.Sprintf("round %d decided but not closed in time", round)
	default:
		return hold(false, "no decision for round %d in time", round)
	}
	v.Action = m.controlName(round, v.Control)
	return v
}

// ControlName names control c of this robot as round's state names it.
func (m *Machine) ControlName(round uint64, c int) string { return m.controlName(round, c) }

func (m *Machine) controlName(round uint64, c int) string {
	cn, ok := m.cfg.Model.(model.ControlNamer)
	if !ok {
		return "control-" + strconv.Itoa(c)
	}
	x := m.cur.x
	if ent := m.hist[round]; ent != nil {
		x = ent.x
	}
	if x == nil { // before any round: name it as at the start
		x = m.cfg.Model.NewState()
		m.cfg.Model.Start(x, model.NewRNG(0).Rand)
	}
	return cn.ControlName(x, m.cfg.Robot, c)
}

func orEmpty(s []uint32) []uint32 {
	if s == nil {
		return []uint32{}
	}
	return s
}

// Health says whether this robot can act on rounds now, and what it is
// doing, for /healthz: before any round it is waiting (healthy); with no
// round start admitted for Stale it holds (unhealthy), saying why.
func (m *Machine) Health(now time.Duration) (bool, string) {
	switch {
	case !m.following && m.refusal != "":
		return false, m.refusal
	case !m.following:
		return true, "waiting for the first round"
	case now-m.lastAt > m.cfg.Stale && m.refusal != "":
		return false, fmt.Sprintf("holding since round %d: %s", m.cur.round, m.refusal)
	case now-m.lastAt > m.cfg.Stale:
		return false, fmt.Sprintf("holding: no round start admitted for %s since round %d (coordinator gone, or its round starts refused: see the dropped-message counts)",
			(now - m.lastAt).Truncate(time.Millisecond), m.cur.round)
	}
	return true, fmt.Sprintf("run %d round %d", m.epoch, m.cur.round)
}
