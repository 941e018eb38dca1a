// Package vnet runs a fleet of turn.Machines over an in-memory network in
// virtual time: a discrete-event loop with a priority queue ordered by time
// and, for equal times, by insertion, so a run with the same faults replays
// exactly. It has no goroutines and no real clock, so tests and drills can
// inject delays, losses and paused robots and check timings to the
// nanosecond.
package vnet

import (
	"container/heap"
	"fmt"
	"time"

	"baton/agentd/turn"
	pb "baton/proto"

	"google.golang.org/protobuf/proto"
)

// ComputeFunc stands in for the rollout: it returns the robot's control and
// how long the computation took; the Computed event arrives that much later.
type ComputeFunc func(robot int, c turn.Compute) (control int, took time.Duration)

// LossFunc reports whether the message from robot from to robot to for a
// round is lost.
type LossFunc func(from, to int, round uint64) bool

// Config describes the fleet and the default network.
type Config struct {
	Fleet   string
	Robots  int
	Delay   time.Duration // default one-way delay of every link, self included
	Compute ComputeFunc   // nil: control 0, instantly
}

// Sender is the sender name robot r publishes under.
func Sender(r int) string { return fmt.Sprintf("robot-%d", r) }

// Turn is one robot's part of a round as the network saw it.
type Turn struct {
	InOrder  bool
	Asked    bool          // the machine asked to Compute
	AskedAt  time.Duration // when it asked
	Known    []int         // Compute.Known (copy)
	Guess    []int         // Compute.Guess (copy)
	Decision *pb.Decision  // nil when the robot published nothing
	// PublishedAt is when the decision left the robot (valid if Decision != nil).
	PublishedAt time.Duration
}

// RoundResult is what happened in one round.
type RoundResult struct {
	Round uint64
	Start time.Duration // when the round was started
	Order []int
	Turns []Turn // by robot id
	// End is when the last decision of the round was published (Start if
	// none was); Complete says whether every robot in the order published.
	End      time.Duration
	Complete bool
}

// Latency is End - Start.
func (r RoundResult) Latency() time.Duration { return r.End - r.Start }

// Net is the simulated fleet and network.
type Net struct {
	cfg      Config
	machines []*turn.Machine
	now      time.Duration
	seq      uint64
	q        queue
	delay    map[[2]int]time.Duration
	start    []time.Duration
	paused   []bool
	loss     LossFunc
	rounds   map[uint64]*RoundResult
	drops    [][]turn.Drop
}

// New builds a fleet of cfg.Robots machines at virtual time 0.
func New(cfg Config) *Net {
	n := &Net{
		cfg:    cfg,
		delay:  make(map[[2]int]time.Duration),
		rounds: make(map[uint64]*RoundResult),
	}
	robots := max(cfg.Robots, 0)
	n.machines = make([]*turn.Machine, robots)
	for r := range n.machines {
		n.machines[r] = turn.New(turn.Config{Fleet: cfg.Fleet, Robot: r, Robots: robots, Sender: Sender(r)})
	}
	n.start = make([]time.Duration, robots)
	n.paused = make([]bool, robots)
	n.drops = make([][]turn.Drop, robots)
	return n
}

func (n *Net) valid(r int) bool { return r >= 0 && r < len(n.machines) }

// SetDelay sets the one-way delay of the link from -> to.
func (n *Net) SetDelay(from, to int, d time.Duration) {
	if n.valid(from) && n.valid(to) {
		n.delay[[2]int{from, to}] = max(d, 0)
	}
}

// SetLoss installs a loss rule for decision messages (nil: no loss).
func (n *Net) SetLoss(f LossFunc) { n.loss = f }

// SetPaused freezes a robot: while paused it receives nothing (round
// starts, decisions, timers, compute results are lost), so it never
// publishes.
func (n *Net) SetPaused(robot int, paused bool) {
	if n.valid(robot) {
		n.paused[robot] = paused
	}
}

// SetStartDelay delays a robot's receipt of every round start by d (its
// deadlines count from receipt).
func (n *Net) SetStartDelay(robot int, d time.Duration) {
	if n.valid(robot) {
		n.start[robot] = max(d, 0)
	}
}

// Machine is robot r's state machine (for counters).
func (n *Net) Machine(r int) *turn.Machine {
	if !n.valid(r) {
		return nil
	}
	return n.machines[r]
}

// Drops is every Drop robot r's machine reported, in order.
func (n *Net) Drops(r int) []turn.Drop {
	if !n.valid(r) {
		return nil
	}
	return append([]turn.Drop(nil), n.drops[r]...)
}

// Now is the virtual time.
func (n *Net) Now() time.Duration { return n.now }

// Pending is how many events are queued.
func (n *Net) Pending() int { return len(n.q) }

// Inject delivers raw bytes to robot to at time at (not before now), as if
// they came from the network: forged, replayed or corrupt messages.
func (n *Net) Inject(at time.Duration, to int, data []byte) {
	if n.valid(to) {
		at = max(at, n.now)
		n.push(at, to, turn.Heard{Now: at, Data: data})
	}
}

// StartRound sends the round start to every robot (after its start delay)
// without running the loop.
func (n *Net) StartRound(round uint64, order []int, deadlines []time.Duration, mode turn.Mode, controls []int) {
	rr := &RoundResult{
		Round: round,
		Start: n.now,
		Order: append([]int(nil), order...),
		Turns: make([]Turn, len(n.machines)),
		End:   n.now,
	}
	for _, r := range order {
		if n.valid(r) {
			rr.Turns[r].InOrder = true
		}
	}
	n.rounds[round] = rr
	for r := range n.machines {
		at := n.now + n.start[r]
		n.push(at, r, turn.Round{
			Now:       at,
			Round:     round,
			Order:     append([]int(nil), order...),
			Deadlines: append([]time.Duration(nil), deadlines...),
			Mode:      mode,
			Controls:  append([]int(nil), controls...),
		})
	}
}

// Run processes events until none is left. Machines emit a bounded number
// of actions per round, so it terminates.
func (n *Net) Run() {
	for len(n.q) > 0 {
		n.deliver(heap.Pop(&n.q).(item))
	}
}

// RunUntil processes every event due at or before t, then sets the clock to
// t (if later). Events after t stay queued: late messages then reach the
// next round.
func (n *Net) RunUntil(t time.Duration) {
	for len(n.q) > 0 && n.q[0].at <= t {
		n.deliver(heap.Pop(&n.q).(item))
	}
	n.now = max(n.now, t)
}

// Result is what is known so far about a round (zero if never started).
func (n *Net) Result(round uint64) RoundResult {
	rr, ok := n.rounds[round]
	if !ok {
		return RoundResult{}
	}
	out := *rr
	out.Turns = append([]Turn(nil), rr.Turns...)
	out.Complete = len(rr.Order) > 0
	for _, r := range rr.Order {
		if !n.valid(r) || rr.Turns[r].Decision == nil {
			out.Complete = false
		}
	}
	return out
}

// RunRound starts a round, runs until the network is quiet and reports it.
func (n *Net) RunRound(round uint64, order []int, deadlines []time.Duration, mode turn.Mode, controls []int) RoundResult {
	n.StartRound(round, order, deadlines, mode, controls)
	n.Run()
	return n.Result(round)
}

func (n *Net) linkDelay(from, to int) time.Duration {
	if d, ok := n.delay[[2]int{from, to}]; ok {
		return d
	}
	return max(n.cfg.Delay, 0)
}

func (n *Net) push(at time.Duration, to int, ev turn.Event) {
	n.seq++
	heap.Push(&n.q, item{at: at, seq: n.seq, to: to, ev: ev})
}

func (n *Net) deliver(it item) {
	n.now = it.at
	if n.paused[it.to] {
		return
	}
	for _, a := range n.machines[it.to].Step(it.ev) {
		switch a := a.(type) {
		case turn.Arm:
			at := max(a.At, n.now)
			n.push(at, it.to, turn.Timer{Now: at, Round: a.Round})
		case turn.Compute:
			if rr := n.rounds[a.Round]; rr != nil {
				t := &rr.Turns[it.to]
				t.Asked, t.AskedAt = true, n.now
				t.Known = append([]int(nil), a.Known...)
				t.Guess = append([]int(nil), a.Guess...)
			}
			control, took := 0, time.Duration(0)
			if n.cfg.Compute != nil {
				control, took = n.cfg.Compute(it.to, a)
			}
			took = max(took, 0)
			n.push(n.now+took, it.to, turn.Computed{Now: n.now + took, Round: a.Round, Control: control, Took: took})
		case turn.Publish:
			n.publish(it.to, a.Decision)
		case turn.Drop:
			n.drops[it.to] = append(n.drops[it.to], a)
		}
	}
}

func (n *Net) publish(from int, d *pb.Decision) {
	if d == nil {
		return
	}
	if rr := n.rounds[d.Round]; rr != nil {
		rr.Turns[from].Decision = d
		rr.Turns[from].PublishedAt = n.now
		rr.End = max(rr.End, n.now)
	}
	data, err := proto.Marshal(d)
	if err != nil {
		return // a Decision always marshals; nothing sensible to send otherwise
	}
	for to := range n.machines {
		if n.loss != nil && n.loss(from, to, d.Round) {
			continue
		}
		at := n.now + n.linkDelay(from, to)
		n.push(at, to, turn.Heard{Now: at, Data: data})
	}
}

// item is one scheduled delivery.
type item struct {
	at  time.Duration
	seq uint64
	to  int
	ev  turn.Event
}

// queue is a min-heap by (at, seq).
type queue []item

func (q queue) Len() int { return len(q) }
func (q queue) Less(i, j int) bool {
	if q[i].at != q[j].at {
		return q[i].at < q[j].at
	}
	return q[i].seq < q[j].seq
}
func (q queue) Swap(i, j int) { q[i], q[j] = q[j], q[i] }
func (q *queue) Push(x any)   { *q = append(*q, x.(item)) }
func (q *queue) Pop() any {
	old := *q
	it := old[len(old)-1]
	*q = old[:len(old)-1]
	return it
}
