package node

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"go.uber.org/zap"
	"google.golang.org/protobuf/proto"

	"baton/agentd/decide"
	"baton/agentd/turn"
	"baton/deploy/shell"
	pb "baton/proto"
	"baton/signal"
	"baton/signal/learn"
	"baton/sim/model"
)

// Computer runs one robot's rollout turn. The default is decide.Decider;
// benchmarks swap in a stub of fixed cost.
type Computer interface {
	Turn(x model.State, r int, known []int, seed uint64, p *pb.DecideParams) int
}

// Rollout is the real Computer: one Decider, rebuilt when the fleet's
// parameters change, used by one turn at a time.
type Rollout struct {
	M model.Model

	mu     sync.Mutex
	d      *decide.Decider
	params decide.Config
}

func (r *Rollout) Turn(x model.State, robot int, known []int, seed uint64, p *pb.DecideParams) int {
	r.mu.Lock()
	defer r.mu.Unlock()
	cfg := decideConfig(p)
	if r.d == nil || cfg != r.params {
		r.d, r.params = decide.New(r.M, cfg), cfg
	}
	c, _ := r.d.Turn(x, robot, known, seed)
	return c
}

// decideConfig is the fleet's Monte Carlo effort as decide takes it: the
// robot's own turn and recompute's guesses must use the same.
func decideConfig(p *pb.DecideParams) decide.Config {
	return decide.Config{Samples: int(p.GetSamples()), Horizon: int(p.GetHorizon()), TerminalCost: p.GetTerminalCost()}
}

// Config of one robot's daemon.
type Config struct {
	Fleet    string
	Subjects pb.Subjects
	Robot    int
	Sender   string
	Model    model.Fleet
	// Digest of the scenario file; rounds with another digest are refused.
	Digest string
	// Compute is nil for the real rollout.
	Compute Computer
	// Guess is the fallback guess source: used when a round start names
	// none, or names one this robot cannot make (learned without a
	// classifier, or a name this build does not know). nil: base. The
	// source a round start names is built from Guesses.
	Guess signal.Source
	// Guesses configures the sources round starts name (the classifier
	// for learned, recompute's fallback).
	Guesses signal.Options
	// GuessMargin is what recompute leaves before this robot's own turn
	// deadline, besides the measured hop and its own turn (default 2ms).
	GuessMargin time.Duration
	// InjectDelay holds back this robot's own decision publishes: fault
	// injection in our own message layer, for drills and tests.
	InjectDelay time.Duration
	// Stale: with no round start for this long the robot holds.
	Stale   time.Duration
	Log     *zap.Logger
	Metrics *Metrics
	// FetchModel fetches version v of the fleet's guess model (nil: this
	// robot does not take models from the fleet).
	FetchModel func(ctx context.Context, v uint64) ([]byte, error)
	// OnRound, when set, is told when this robot accepted a round start
	// (the latency benchmark times the turn chain from there).
	OnRound func(round uint64, at time.Time)
}

// View is what the robot's own software sees of a round.
type View struct {
	Round   uint64   `json:"round"`
	Control int      `json:"control"`
	Action  string   `json:"action"`
	Hold    bool     `json:"hold"`
	Reason  string   `json:"reason,omitempty"`
	Heard   []uint32 `json:"heard"`
	Guessed []uint32 `json:"guessed"`
	Decided bool     `json:"decided"`
	Closed  bool     `json:"closed"`
	// RoundLatencyUs is the coordinator's measure of the whole round, once closed.
	RoundLatencyUs uint64 `json:"round_latency_us,omitempty"`
	SitOut         bool   `json:"-"`
}

// Node is one running daemon.
type Node struct {
	cfg     Config
	nc      *nats.Conn
	machine *turn.Machine
	epoch   time.Time
	events  chan any
	hop     atomic.Int64 // ns

	// Event-loop state.
	x         model.State
	params    *pb.DecideParams
	roundAt   time.Duration
	mode      turn.Mode
	order     []int
	deadlines []time.Duration
	guessName string                   // the current round's guess source, as named
	sources   map[string]signal.Source // built on first use; only the loop uses them
	saidBase  bool                     // logged that unloaded learned guesses are base
	turnTook  time.Duration            // this robot's last turn compute, what recompute must leave for it
	// The last closed round and its controls, -1 for held robots: the
	// last source's input.
	closed    uint64
	closedCtl []int
	pending   map[uint64]pending
	lateSeen  uint64
	drops     shell.Drops
	runEpoch  uint64 // the coordinator run whose rounds these are
	haveEpoch bool
	ctx       context.Context
	// Guess models: the loaded version, one fetch at a time, and versions
	// that failed (not fetched again for a while).
	modelVersion atomic.Uint64
	fetching     bool
	modelFailed  map[uint64]time.Time

	mu        sync.Mutex
	views     map[uint64]*View
	latest    uint64
	lastStart time.Time
	changed   chan struct{}
	state     model.State // last round's state, for checking reports
	refusal   string      // why the latest round start was refused, if it was
	lastObs   []byte      // the latest report sent, re-sent when a coordinator asks
}

type modelMsg struct {
	version uint64
	net     *learn.Net
	err     error
}

type pending struct {
	x         model.State
	params    *pb.DecideParams
	order     []int
	deadlines []time.Duration
	guess     string
}

type roundMsg struct {
	at   time.Duration
	data []byte
}
type closeMsg struct{ data []byte }

// New prepares a node on an open connection.
func New(cfg Config, nc *nats.Conn) *Node {
	if cfg.Compute == nil {
		cfg.Compute = &Rollout{M: cfg.Model}
	}
	if cfg.Guess == nil {
		cfg.Guess = signal.Base{M: cfg.Model}
	}
	if cfg.GuessMargin <= 0 {
		cfg.GuessMargin = 2 * time.Millisecond
	}
	if cfg.Stale <= 0 {
		cfg.Stale = 10 * time.Second
	}
	if cfg.Log == nil {
		cfg.Log = zap.NewNop()
	}
	if cfg.Metrics == nil {
		cfg.Metrics = NewMetrics(nil)
	}
	n := &Node{
		cfg: cfg, nc: nc, epoch: time.Now(), events: make(chan any, 4096),
		machine:     turn.New(turn.Config{Fleet: cfg.Fleet, Robot: cfg.Robot, Robots: cfg.Model.Robots(), Sender: cfg.Sender}),
		pending:     map[uint64]pending{},
		modelFailed: map[uint64]time.Time{},
		ctx:         context.Background(),
		sources:     map[string]signal.Source{},
		closedCtl:   make([]int, cfg.Model.Robots()),
		views:       map[uint64]*View{},
		changed:     make(chan struct{}),
		drops:       shell.Drops{Log: cfg.Log, Counter: cfg.Metrics.Dropped},
	}
	return n
}

func (n *Node) now() time.Duration { return time.Since(n.epoch) }

// Run subscribes and serves events until ctx ends.
func (n *Node) Run(ctx context.Context) error {
	n.ctx = ctx
	// One channel for every subject: the client's reader hands messages
	// straight to this loop, one goroutine wake-up per message instead of
	// a delivery goroutine per subscription and a second hand-off.
	s := n.cfg.Subjects
	msgs := make(chan *nats.Msg, 4096)
	for _, subj := range []string{s.Round, s.Decision, s.Close, s.Hello} {
		ss, err := n.nc.ChanSubscribe(subj, msgs)
		if err != nil {
			return fmt.Errorf("subscribe %s: %w", subj, err)
		}
		_ = ss.SetPendingLimits(-1, -1)
		defer ss.Unsubscribe()
	}
	if err := n.nc.Flush(); err != nil {
		return fmt.Errorf("nats flush: %w", err)
	}
	go n.measureHop(ctx)
	for {
		select {
		case <-ctx.Done():
			return nil
		case msg := <-msgs:
			switch msg.Subject {
			case s.Round:
				n.onRound(roundMsg{at: n.now(), data: msg.Data})
			case s.Close:
				n.onClose(msg.Data)
			case s.Hello:
				n.onHello(msg.Data)
			default:
				n.apply(n.machine.Step(turn.Heard{Now: n.now(), Data: msg.Data}))
			}
		case ev := <-n.events:
			n.handle(ev)
		}
	}
}

func (n *Node) measureHop(ctx context.Context) {
	t := time.NewTicker(time.Second)
	defer t.Stop()
	for {
		if rtt, err := n.nc.RTT(); err == nil {
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

func (n *Node) handle(ev any) {
	switch ev := ev.(type) {
	case roundMsg:
		n.onRound(ev)
	case closeMsg:
		n.onClose(ev.data)
	case modelMsg:
		n.onModel(ev)
	case turn.Event:
		n.apply(n.machine.Step(ev))
	}
}

func (n *Node) drop(reason turn.DropReason, sender, detail string) {
	n.apply([]turn.Action{turn.Drop{Reason: reason, Sender: sender, Detail: detail}})
}

func (n *Node) onRound(ev roundMsg) {
	var rs pb.RoundStart
	if err := proto.Unmarshal(ev.data, &rs); err != nil {
		n.drop(turn.DropMalformed, "", "round start: "+err.Error())
		return
	}
	if rs.GetFleet() != n.cfg.Fleet {
		n.drop(turn.DropForeign, rs.GetSender(), fmt.Sprintf("round start for fleet %q, this is %q", rs.GetFleet(), n.cfg.Fleet))
		return
	}
	if n.cfg.Digest != "" && rs.GetScenarioDigest() != n.cfg.Digest {
		why := fmt.Sprintf("round %d was started on scenario digest %s, this robot runs %s: start both with the same scenario file and --robots",
			rs.GetRound(), rs.GetScenarioDigest(), n.cfg.Digest)
		n.mu.Lock()
		n.refusal = "refusing rounds: " + why
		n.mu.Unlock()
		n.drop(turn.DropForeign, rs.GetSender(), why)
		return
	}
	m := n.cfg.Model
	x := m.NewState()
	if rs.GetState().GetScenario() != m.Name() {
		n.drop(turn.DropMalformed, rs.GetSender(), fmt.Sprintf("round %d: snapshot of scenario %q, this robot runs %q", rs.GetRound(), rs.GetState().GetScenario(), m.Name()))
		return
	}
	if err := m.Unflatten(x, rs.GetState().GetInts(), rs.GetState().GetReals()); err != nil {
		n.drop(turn.DropMalformed, rs.GetSender(), fmt.Sprintf("round %d: %v", rs.GetRound(), err))
		return
	}
	if e := rs.GetEpoch(); e != n.runEpoch || !n.haveEpoch {
		if n.haveEpoch {
			// A restarted coordinator counts from 1 again: start over
			// rather than drop its rounds as stale.
			n.cfg.Log.Info("the coordinator restarted; starting over with its rounds",
				zap.Uint64("round", rs.GetRound()), zap.Uint64("after_round", n.machine.Round()))
			n.machine = turn.New(turn.Config{Fleet: n.cfg.Fleet, Robot: n.cfg.Robot, Robots: n.cfg.Model.Robots(), Sender: n.cfg.Sender})
			n.lateSeen, n.closed = 0, 0
			n.mu.Lock()
			clear(n.views)
			n.latest = 0
			n.mu.Unlock()
		}
		n.runEpoch, n.haveEpoch = e, true
	}
	mode := turn.Mode(rs.GetMode())
	order := make([]int, len(rs.GetOrder()))
	for i, r := range rs.GetOrder() {
		order[i] = int(r)
	}
	deadlines := make([]time.Duration, len(rs.GetDeadlinesUs()))
	for i, d := range rs.GetDeadlinesUs() {
		deadlines[i] = time.Duration(d) * time.Microsecond
	}
	controls := make([]int, m.Robots())
	for j := range controls {
		controls[j] = m.NumControls(x, j)
	}
	before := n.machine.Round()
	n.pending[rs.GetRound()] = pending{x: x, params: rs.GetParams(), order: order, deadlines: deadlines, guess: rs.GetGuessSource()}
	acts := n.machine.Step(turn.Round{Now: ev.at, Round: rs.GetRound(), Order: order, Deadlines: deadlines, Mode: mode, Controls: controls})
	if r := n.machine.Round(); r != before && r == rs.GetRound() {
		p := n.pending[r]
		n.x, n.params, n.roundAt, n.mode = p.x, p.params, ev.at, mode
		n.order, n.deadlines, n.guessName = p.order, p.deadlines, p.guess
		n.cfg.Metrics.Rounds.Inc()
		if n.cfg.OnRound != nil {
			n.cfg.OnRound(r, n.epoch.Add(ev.at))
		}
		in := slices.Contains(order, n.cfg.Robot)
		n.maybeFetch(rs.GetGuessModelVersion())
		n.mu.Lock()
		n.latest, n.lastStart, n.state, n.refusal = r, time.Now(), x, ""
		v := n.view(r)
		if !in {
			v.SitOut, v.Hold, v.Reason = true, true, "not in this round's order"
		}
		for k := range n.views {
			if k+64 < r {
				delete(n.views, k)
			}
		}
		n.notify()
		n.mu.Unlock()
	}
	clear(n.pending)
	n.apply(acts)
}

func (n *Node) onClose(data []byte) {
	var rc pb.RoundClose
	if err := proto.Unmarshal(data, &rc); err != nil {
		n.drop(turn.DropMalformed, "", "round close: "+err.Error())
		return
	}
	if rc.GetFleet() != n.cfg.Fleet {
		n.drop(turn.DropForeign, rc.GetSender(), fmt.Sprintf("round close for fleet %q", rc.GetFleet()))
		return
	}
	if len(rc.GetControls()) != n.cfg.Model.Robots() {
		n.drop(turn.DropMalformed, rc.GetSender(), fmt.Sprintf("round close with %d controls for %d robots", len(rc.GetControls()), n.cfg.Model.Robots()))
		return
	}
	if r := rc.GetRound(); r > n.closed {
		n.closed = r
		for j, c := range rc.GetControls() {
			n.closedCtl[j] = int(c)
		}
		for _, h := range rc.GetHeld() {
			if int(h) < len(n.closedCtl) {
				n.closedCtl[h] = -1 // held: it decided nothing
			}
		}
	}
	n.mu.Lock()
	defer n.mu.Unlock()
	v := n.view(rc.GetRound())
	v.Closed = true
	v.RoundLatencyUs = rc.GetLatencyUs()
	v.Control = int(rc.GetControls()[n.cfg.Robot])
	if slices.Contains(rc.GetHeld(), uint32(n.cfg.Robot)) {
		v.Control, v.Hold = 0, true
		if v.Reason == "" {
			v.Reason = "round closed without this robot's decision"
		}
	}
	v.Action = n.controlName(v.Control)
	n.notify()
}

// view returns the round's view, making it; n.mu is held.
func (n *Node) view(r uint64) *View {
	v, ok := n.views[r]
	if !ok {
		v = &View{Round: r, Action: n.controlName(0), Heard: []uint32{}, Guessed: []uint32{}}
		n.views[r] = v
	}
	return v
}

func (n *Node) controlName(c int) string {
	cn, ok := n.cfg.Model.(model.ControlNamer)
	if !ok {
		return fmt.Sprintf("control-%d", c)
	}
	x := n.x
	if x == nil { // before any round: name it as at the start
		x = n.cfg.Model.NewState()
		n.cfg.Model.Start(x, model.NewRNG(0).Rand)
	}
	return cn.ControlName(x, n.cfg.Robot, c)
}

// notify wakes long-polling readers; n.mu is held.
func (n *Node) notify() {
	close(n.changed)
	n.changed = make(chan struct{})
}

func (n *Node) apply(acts []turn.Action) {
	for _, a := range acts {
		switch a := a.(type) {
		case turn.Arm:
			d := a.At - n.now()
			round := a.Round
			time.AfterFunc(max(d, 0), func() { n.events <- turn.Timer{Now: n.now(), Round: round} })
		case turn.Compute:
			n.compute(a)
		case turn.Publish:
			n.publish(a.Decision)
		case turn.Drop:
			n.drops.Drop(string(a.Reason), a.Sender, a.Detail)
		}
	}
	if late := n.machine.Late(); late > n.lateSeen {
		n.cfg.Metrics.Late.Add(float64(late - n.lateSeen))
		n.lateSeen = late
	}
}

func (n *Node) compute(c turn.Compute) {
	x, params := n.x, n.params
	known := slices.Clone(c.Known)
	if len(c.Guess) > 0 {
		n.guess(c, known)
	}
	seed := decide.TurnSeed(params.GetFleetSeed(), int(c.Round), n.cfg.Robot)
	// The turn runs on the loop goroutine: handing it to another goroutine
	// and back costs two thread wake-ups per turn, which on an idle site
	// computer is most of a turn's overhead. Messages that arrive meanwhile
	// queue and are handled (late ones counted) right after.
	t0 := time.Now()
	ctl := n.cfg.Compute.Turn(x, n.cfg.Robot, known, seed, params)
	took := time.Since(t0)
	n.turnTook = took
	n.cfg.Metrics.Compute.Observe(took.Seconds())
	n.apply(n.machine.Step(turn.Computed{Now: n.now(), Round: c.Round, Control: ctl, Took: took}))
}

// guess fills known's missing predecessors from the round's guess source.
func (n *Node) guess(c turn.Compute, known []int) {
	src := n.source(n.guessName)
	ctx := &signal.Context{X: n.x, Round: c.Round, Order: n.order, Robot: n.cfg.Robot, Known: c.Known,
		Last: n.last(c.Round), Seed: n.params.GetFleetSeed(), Decide: decideConfig(n.params)}
	if k := slices.Index(n.order, n.cfg.Robot); k >= 0 && k < len(n.deadlines) {
		// Stop recomputing once one more recompute and this robot's own
		// turn (each about turnTook) no longer fit before its deadline,
		// less the hop that delivers the decision and a margin.
		due := n.roundAt + n.deadlines[k] - n.cfg.GuessMargin - time.Duration(n.hop.Load())
		ctx.Expired = func() bool { return n.now()+2*n.turnTook >= due }
	}
	src.Fill(ctx, c.Guess, known)
}

// last is every robot's control in the round before r, -1 where it held
// or when that round's close was not seen.
func (n *Node) last(r uint64) []int {
	if n.closed == 0 || n.closed+1 != r {
		return nil
	}
	return n.closedCtl // sources only read the Context
}

// source is the guess source a round start names, or the fallback when it
// names none or one this robot cannot make; each substitution is logged
// once per name.
func (n *Node) source(name string) signal.Source {
	fb := n.cfg.Guess
	if name == "" || name == fb.Name() {
		return n.unloaded(fb)
	}
	if s, ok := n.sources[name]; ok {
		return s
	}
	why := ""
	if name == "learned" && n.cfg.Guesses.Classifier == nil {
		why = "no classifier loaded"
	}
	var s signal.Source
	if why == "" {
		var err error
		if s, err = signal.New(name, n.cfg.Model, n.cfg.Guesses); err != nil {
			why = err.Error()
		}
	}
	if why != "" {
		n.cfg.Log.Warn("the round start names a guess source this robot cannot make; using the fallback (--guess)",
			zap.String("named", name), zap.String("fallback", fb.Name()), zap.String("why", why))
		s = fb
	}
	n.sources[name] = s
	return n.unloaded(s)
}

// unloaded says once that learned guesses are base guesses while no
// classifier is loaded.
func (n *Node) unloaded(s signal.Source) signal.Source {
	if l, ok := s.(signal.Learned); ok && !l.Loaded() && !n.saidBase {
		n.saidBase = true
		n.cfg.Log.Warn("no classifier loaded: learned guesses are the base policy's")
	}
	return s
}

func (n *Node) publish(d *pb.Decision) {
	if int(d.GetControl()) >= n.cfg.Model.NumControls(n.x, n.cfg.Robot) {
		n.cfg.Log.Error("rollout produced an out-of-range control; holding", zap.Int32("control", d.GetControl()))
		return
	}
	d.HopUs = uint64(n.hop.Load() / 1000)
	data, err := proto.Marshal(d)
	if err != nil {
		n.cfg.Log.Error("marshal decision", zap.Error(err))
		return
	}
	n.cfg.Metrics.TurnLatency.WithLabelValues(n.mode.String()).Observe((n.now() - n.roundAt).Seconds())
	guessed := "no"
	if len(d.GetGuessed()) > 0 {
		guessed = "yes"
	}
	n.cfg.Metrics.Turns.WithLabelValues(guessed).Inc()
	n.mu.Lock()
	v := n.view(d.GetRound())
	if !v.Closed {
		v.Control, v.Decided = int(d.GetControl()), true
		v.Action = n.controlName(v.Control)
		v.Heard, v.Guessed = orEmpty(d.GetHeard()), orEmpty(d.GetGuessed())
	}
	n.notify()
	n.mu.Unlock()
	subj := n.cfg.Subjects.DecisionOf(n.cfg.Robot)
	send := func() {
		if err := n.nc.Publish(subj, data); err != nil {
			n.cfg.Log.Warn("publish decision", zap.Uint64("round", d.GetRound()), zap.Error(err))
		}
	}
	if n.cfg.InjectDelay > 0 {
		time.AfterFunc(n.cfg.InjectDelay, send)
	} else {
		send()
	}
}

func orEmpty(s []uint32) []uint32 {
	if s == nil {
		return []uint32{}
	}
	return s
}

// Decision returns the view of round r (0: the latest), waiting up to wait
// for it to be decided (or closed, with closed set). A robot with nothing
// valid holds: the view says so and why.
func (n *Node) Decision(ctx context.Context, r uint64, wait time.Duration, closed bool) View {
	deadline := time.NewTimer(wait)
	defer deadline.Stop()
	for {
		n.mu.Lock()
		round := r
		if round == 0 {
			round = n.latest
		}
		v, ok := n.views[round]
		ch := n.changed
		var out View
		if ok {
			out = *v
		}
		stale := n.lastStart.IsZero() || time.Since(n.lastStart) > n.cfg.Stale
		latest, refusal := n.latest, n.refusal
		n.mu.Unlock()
		done := ok && (out.Closed || (!closed && (out.Decided || out.SitOut)))
		// Nothing old is ever served as something to do: a decision is
		// only good while its round is the current one and recent.
		if done && !out.Hold {
			switch {
			case !n.nc.IsConnected():
				out.Hold, out.Reason = true, "lost contact with NATS: no current decision"
			case round == latest && stale:
				out.Hold, out.Reason = true, fmt.Sprintf("round %d started over %s ago and no round since (coordinator gone?)", round, n.cfg.Stale)
			case round < latest:
				out.Hold, out.Reason = true, fmt.Sprintf("round %d is over; the current round is %d", round, latest)
			}
			if out.Hold {
				out.Control, out.Action = 0, n.controlName(0)
			}
		}
		if done {
			return out
		}
		select {
		case <-ch:
			continue
		case <-ctx.Done():
		case <-deadline.C:
		}
		out.Round, out.Control, out.Hold = round, 0, true
		out.Action = n.controlName(0)
		switch {
		case refusal != "":
			out.Reason = refusal
		case round == 0 || (r == 0 && stale):
			out.Reason = fmt.Sprintf("no round started in the last %s (coordinator gone?)", n.cfg.Stale)
		case !ok:
			out.Reason = fmt.Sprintf("round %d has not started here", round)
		default:
			out.Reason = fmt.Sprintf("no decision for round %d in time", round)
		}
		if out.Heard == nil {
			out.Heard, out.Guessed = []uint32{}, []uint32{}
		}
		return out
	}
}

// Report is an observation from the robot's own software.
type Report struct {
	Round    uint64           `json:"round"`
	Position int32            `json:"position"`
	Applied  int              `json:"applied"`
	Seen     []model.Sighting `json:"seen"`
}

// ErrBadReport wraps reports the model refuses.
var ErrBadReport = errors.New("bad observation")

// Observe checks a report against the model and sends it to the coordinator.
func (n *Node) Observe(rep Report) error {
	m := n.cfg.Model
	n.mu.Lock()
	scratch := m.NewState()
	if n.state != nil {
		m.CopyState(scratch, n.state)
	} else {
		m.Start(scratch, model.NewRNG(0).Rand)
	}
	latest := n.latest
	n.mu.Unlock()
	// A report is about the round just carried out; one a round or so off
	// is a race, anything further a wrong counter. Round 0 ("where I am")
	// is always fine.
	if rep.Round != 0 && (rep.Round+1 < latest || rep.Round > latest+1) {
		return fmt.Errorf("%w: report for round %d, but the current round is %d", ErrBadReport, rep.Round, latest)
	}
	if rep.Applied < 0 || rep.Applied >= m.MaxControls() {
		return fmt.Errorf("%w: applied control %d is not one of 0..%d", ErrBadReport, rep.Applied, m.MaxControls()-1)
	}
	if err := m.Absorb(scratch, n.cfg.Robot, rep.Position, rep.Seen); err != nil {
		return fmt.Errorf("%w: %v", ErrBadReport, err)
	}
	obs := &pb.Observation{Fleet: n.cfg.Fleet, Round: rep.Round, Robot: uint32(n.cfg.Robot), Position: rep.Position,
		Applied: int32(rep.Applied), Sender: n.cfg.Sender}
	for _, s := range rep.Seen {
		obs.Seen = append(obs.Seen, &pb.Sighting{What: s.What, Value: s.Value})
	}
	data, err := proto.Marshal(obs)
	if err != nil {
		return err
	}
	if err := n.nc.Publish(n.cfg.Subjects.ObsOf(n.cfg.Robot), data); err != nil {
		return fmt.Errorf("sending observation: %w", err)
	}
	n.mu.Lock()
	n.lastObs = data
	n.mu.Unlock()
	return nil
}

// onHello answers a coordinator that waits for first reports (a new or
// restarted one) with this robot's latest report.
func (n *Node) onHello(data []byte) {
	var req pb.ReportRequest
	if err := proto.Unmarshal(data, &req); err != nil {
		n.drop(turn.DropMalformed, "", "report request: "+err.Error())
		return
	}
	if req.GetFleet() != n.cfg.Fleet {
		n.drop(turn.DropForeign, req.GetSender(), fmt.Sprintf("report request for fleet %q", req.GetFleet()))
		return
	}
	n.mu.Lock()
	last := n.lastObs
	n.mu.Unlock()
	if last == nil {
		return // nothing reported yet: the robot's software will
	}
	if err := n.nc.Publish(n.cfg.Subjects.ObsOf(n.cfg.Robot), last); err != nil {
		n.cfg.Log.Warn("re-sending the latest report", zap.Error(err))
	}
}

// maybeFetch starts fetching guess model v when a round start names one
// this robot does not have (one fetch at a time; a version that failed is
// retried after 30 s).
func (n *Node) maybeFetch(v uint64) {
	if v == 0 || v == n.modelVersion.Load() || n.fetching || n.cfg.FetchModel == nil {
		return
	}
	if t, bad := n.modelFailed[v]; bad && time.Since(t) < 30*time.Second {
		return
	}
	n.fetching = true
	ctx := n.ctx
	go func() {
		fctx, cancel := context.WithTimeout(ctx, 10*time.Second)
		defer cancel()
		data, err := n.cfg.FetchModel(fctx, v)
		var net *learn.Net
		if err == nil {
			var meta learn.Meta
			net, meta, err = learn.Check(data, n.cfg.Model)
			if err == nil && meta.Version != v {
				err = fmt.Errorf("the object for version %d holds version %d", v, meta.Version)
			}
		}
		select {
		case n.events <- modelMsg{version: v, net: net, err: err}:
		case <-ctx.Done():
		}
	}()
}

// onModel swaps in a fetched model, or keeps the one in use when the new
// one is bad.
func (n *Node) onModel(ev modelMsg) {
	n.fetching = false
	if ev.err != nil {
		n.modelFailed[ev.version] = time.Now()
		n.cfg.Log.Error("guess model refused; keeping the one in use", zap.Uint64("version", ev.version),
			zap.Uint64("in_use", n.modelVersion.Load()), zap.Error(ev.err))
		return
	}
	n.modelVersion.Store(ev.version)
	n.cfg.Guesses.Classifier = ev.net
	n.cfg.Metrics.Model.Set(float64(ev.version))
	// Sources hold the classifier: rebuild them on next use.
	clear(n.sources)
	n.saidBase = false
	if n.cfg.Guess.Name() == "learned" {
		if s, err := signal.New("learned", n.cfg.Model, n.cfg.Guesses); err == nil {
			n.cfg.Guess = s
		}
	}
	n.cfg.Log.Info("guess model loaded", zap.Uint64("version", ev.version))
}

// ModelVersion is the guess model version in use (0: none from the fleet).
func (n *Node) ModelVersion() uint64 { return n.modelVersion.Load() }
