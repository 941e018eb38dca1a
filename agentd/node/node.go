package node

import (
	"context"
	"fmt"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"go.uber.org/zap"

	"baton/agentd/decide"
	"baton/agentd/turn"
	"baton/deploy/shell"
	"baton/proto/wire"
)

// Pending limits of the daemon's subscriptions (their channels' capacity;
// see shell.Bus). Round starts and closes come two per round from one
// coordinator and are served first; decisions come one per robot per
// round, so 4096 holds 64 rounds of a 64-robot fleet; report requests come
// once a second while a coordinator gathers, and have their own small
// channel so a flood of them cannot push round starts out. A message that
// finds its channel full is counted as dropped ("slow-consumer").
const (
	ControlPending  = 256
	DecisionPending = 4096
	HelloPending    = 16
)

// Node is one running daemon: it drives the turn machine from the bus and
// real time. The machine holds all round state; the node keeps none.
type Node struct {
	cfg   Config
	bus   shell.Bus
	epoch time.Time // the machine's clock counts from here
	hop   atomic.Int64

	mu      sync.Mutex
	machine *turn.Machine
	changed chan struct{} // closed and replaced after every step

	// Loop-only.
	done     chan struct{} // closed when Run returns
	timers   chan turn.Timer
	models   chan modelMsg
	guesses  *guesser
	drops    shell.Drops
	turnTook time.Duration
	subs     shell.SubDrops
}

// New prepares a node on a bus; cfg must pass Validate.
func New(cfg Config, bus shell.Bus) *Node {
	if cfg.Compute == nil {
		cfg.Compute = NewRollout(cfg.Model)
	}
	if cfg.Log == nil {
		cfg.Log = zap.NewNop()
	}
	if cfg.Metrics == nil {
		cfg.Metrics = NewMetrics(nil)
	}
	n := &Node{
		cfg: cfg, bus: bus, epoch: time.Now(), changed: make(chan struct{}),
		machine: turn.New(turn.Config{Fleet: cfg.Fleet, Robot: cfg.Robot, Model: cfg.Model, Digest: cfg.Digest,
			Sender: cfg.Sender, Stale: cfg.Stale}),
		timers: make(chan turn.Timer, 64), done: make(chan struct{}), models: make(chan modelMsg, 1),
		drops: shell.Drops{Log: cfg.Log, Counter: cfg.Metrics.Dropped},
	}
	n.guesses = newGuesser(n)
	return n
}

func (n *Node) now() time.Duration { return time.Since(n.epoch) }

// step feeds the machine under the lock and wakes readers of its views.
// Peers' decisions and report requests never change what this robot's
// software sees (a decision that completes the wait leads to a Computed
// step, which does), so they wake nobody: in a parallel round every robot
// handles m-1 of them at once.
func (n *Node) step(ev turn.Event) []turn.Action {
	n.mu.Lock()
	acts := n.machine.Step(ev)
	switch ev.(type) {
	case turn.GotDecision, turn.GotHello:
	default:
		close(n.changed)
		n.changed = make(chan struct{})
	}
	n.mu.Unlock()
	return acts
}

// Run subscribes and serves events until ctx ends.
func (n *Node) Run(ctx context.Context) error {
	defer close(n.done)
	s := n.cfg.Subjects
	control := make(chan *nats.Msg, ControlPending)
	decisions := make(chan *nats.Msg, DecisionPending)
	hellos := make(chan *nats.Msg, HelloPending)
	for _, sub := range []struct {
		subject string
		ch      chan *nats.Msg
	}{{s.Round, control}, {s.Close, control}, {s.Hello, hellos}, {s.Decision, decisions}} {
		ss, err := n.bus.ChanSubscribe(sub.subject, sub.ch)
		if err != nil {
			return fmt.Errorf("subscribe %s: %w", sub.subject, err)
		}
		defer ss.Unsubscribe()
		n.subs.Add(ss)
	}
	if err := n.bus.Flush(); err != nil {
		return fmt.Errorf("nats flush: %w", err)
	}
	go n.measureHop(ctx)
	tick := time.NewTicker(time.Second)
	defer tick.Stop()
	for {
		// Round starts and closes first: a flood of decisions must not
		// starve the messages that make rounds.
		select {
		case msg := <-control:
			n.receive(msg)
			continue
		default:
		}
		select {
		case <-ctx.Done():
			return nil
		case msg := <-control:
			n.receive(msg)
		case msg := <-decisions:
			n.receive(msg)
		case msg := <-hellos:
			n.receive(msg)
		case t := <-n.timers:
			t.Now = n.now()
			n.apply(n.step(t))
		case m := <-n.models:
			n.guesses.loaded(m)
		case <-tick.C:
			n.subs.Count(n.cfg.Metrics.Dropped)
		}
	}
}

// receive decodes one message (the only place the daemon decodes protocol
// messages) and hands it to the machine.
func (n *Node) receive(msg *nats.Msg) {
	s := n.cfg.Subjects
	now := n.now()
	var ev turn.Event
	var err error
	switch msg.Subject {
	case s.Round:
		var m turn.Start
		m, err = wire.Start(msg.Data)
		ev = turn.GotStart{Now: now, Msg: m}
	case s.Close:
		var m turn.Close
		m, err = wire.Close(msg.Data)
		ev = turn.GotClose{Now: now, Msg: m}
	case s.Hello:
		var m turn.Hello
		m, err = wire.Hello(msg.Data)
		ev = turn.GotHello{Now: now, Msg: m}
	default:
		var m turn.Decision
		m, err = wire.Decision(msg.Data)
		ev = turn.GotDecision{Now: now, Subject: s.RobotOf(msg.Subject), Msg: m}
	}
	if err != nil {
		n.drops.Drop(string(wire.Reason(err)), msg.Subject, err.Error())
		return
	}
	n.apply(n.step(ev))
}

func (n *Node) measureHop(ctx context.Context) {
	t := time.NewTicker(time.Second)
	defer t.Stop()
	for {
		if rtt, err := n.bus.RTT(); err == nil {
			n.hop.Store(int64(rtt / 2))
			n.cfg.Metrics.Hop.Set((rtt / 2).Seconds())
		}
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
	}
}

func (n *Node) apply(acts []turn.Action) {
	for i := 0; i < len(acts); i++ {
		switch a := acts[i].(type) {
		case turn.Arm:
			d := a.At - n.now()
			ev := turn.Timer{Epoch: a.Epoch, Round: a.Round, Kind: a.Kind}
			time.AfterFunc(max(d, 0), func() {
				select {
				case n.timers <- ev:
				case <-n.done:
				}
			})
		case turn.Compute:
			acts = append(acts, n.compute(a)...)
		case turn.Publish:
			n.publish(a)
		case turn.SendReport:
			n.sendReport(a.Report)
		case turn.Began:
			n.began(a)
		case turn.Note:
			if a.Warn {
				n.cfg.Log.Warn(a.Text)
			} else {
				n.cfg.Log.Info(a.Text)
			}
		case turn.Late:
			n.cfg.Metrics.Late.Inc()
		case turn.Drop:
			n.drops.Drop(string(a.Reason), a.Sender, a.Detail)
		}
	}
}

func (n *Node) began(b turn.Began) {
	n.cfg.Metrics.Rounds.Inc()
	if b.Resync {
		n.cfg.Metrics.Resyncs.Inc()
	}
	if n.cfg.OnRound != nil {
		n.cfg.OnRound(b.Round, time.Now())
	}
	n.guesses.maybeFetch(b.ModelVersion)
}

// compute runs this robot's rollout turn on the loop goroutine: handing it
// to another goroutine and back costs two thread wake-ups per turn, which on
// an idle site computer is most of a turn's overhead. Messages that arrive
// meanwhile queue and are handled (late ones counted) right after. The
// machine's state is never modified once admitted, so it is read here
// without the lock.
func (n *Node) compute(c turn.Compute) []turn.Action {
	known := c.Known
	if len(c.Guess) > 0 {
		known = n.guesses.fill(c)
	}
	seed := decide.TurnSeed(c.Params.Seed, int(c.Round), n.cfg.Robot)
	t0 := time.Now()
	ctl := n.cfg.Compute.Turn(c.State, n.cfg.Robot, known, seed, c.Params)
	took := time.Since(t0)
	n.turnTook = took
	n.cfg.Metrics.Compute.Observe(took.Seconds())
	return n.step(turn.Computed{Now: n.now(), Epoch: c.Epoch, Round: c.Round, Control: ctl, Took: took})
}

func (n *Node) publish(p turn.Publish) {
	d := p.Decision
	if !p.Repeat {
		n.cfg.Metrics.TurnLatency.WithLabelValues(p.Mode.String()).Observe(p.Since.Seconds())
	}
	d.HopUs = uint64(n.hop.Load() / 1000)
	data, err := wire.EncodeDecision(d)
	if err != nil {
		n.cfg.Log.Error("encoding the decision", zap.Error(err))
		return
	}
	guessed := "no"
	if len(d.Guessed) > 0 {
		guessed = "yes"
	}
	if !p.Repeat {
		n.cfg.Metrics.Turns.WithLabelValues(guessed).Inc()
	}
	subj := n.cfg.Subjects.DecisionOf(n.cfg.Robot)
	if err := n.bus.Publish(subj, data); err != nil {
		n.cfg.Log.Warn("publish decision", zap.Uint64("round", d.Round), zap.Error(err))
	}
}

func (n *Node) sendReport(r turn.Report) {
	data, err := wire.EncodeReport(r)
	if err == nil {
		err = n.bus.Publish(n.cfg.Subjects.ObsOf(n.cfg.Robot), data)
	}
	if err != nil {
		n.cfg.Log.Warn("sending a report", zap.Uint64("round", r.Round), zap.Error(err))
	}
}
