// Package hub is the coordinator's shell: it drives the round clock
// (coordinator/clock) from NATS, gossip membership and real time, and
// writes the decision log. The clock holds all round state; the hub keeps
// none. coordinator's main runs it; tests run it in-process.
package hub

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"slices"
	"sort"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"go.uber.org/zap"

	"baton/agentd/turn"
	"baton/coordinator/clock"
	"baton/deploy/shell"
	pb "baton/proto"
	"baton/proto/wire"
)

// Pending limits of the coordinator's subscriptions (their channels'
// capacity): one decision and one report per robot per round, so 4096 holds
// many rounds of the largest fleets. Overflow is counted ("slow-consumer").
const (
	DecisionPending = 4096
	ReportPending   = 4096
	// MembersEvery is how often gossip membership is read at the least.
	MembersEvery = 100 * time.Millisecond
)

// Config of a coordinator's shell.
type Config struct {
	Clock    clock.Config
	Subjects pb.Subjects
	// Alive lists live robot ids (nil: every robot is taken as alive).
	Alive func() []int
	Log   *zap.Logger
	// DecisionLog receives one JSON line per round (Line); flushed per
	// round when it has a Flush method.
	DecisionLog io.Writer
	// Journal is the durable decision log (nil: none): each round's line
	// is appended when the round closes, before its close is published,
	// and again once its reports are filed.
	Journal Journal
	// JournalGiveUp: how long one record is retried (0: JournalGiveUp).
	JournalGiveUp time.Duration
	// GateWait: how long a round's close waits for its record before it
	// goes out anyway (0: GateWait); the record is still written after.
	GateWait time.Duration
	Metrics  *Metrics
	// OnRound is called after each round's reports are filed (progress).
	OnRound func(clock.Record)
}

// Line is one decision-log line: the round's record and its wall-clock
// start. Kind is "closed" on the durable log's write-ahead records (the
// round's decisions, before its reports) and empty on filed rounds.
type Line struct {
	clock.Record
	StartedAt time.Time `json:"started_at"`
	Kind      string    `json:"kind,omitempty"`
}

// Journal is where durable decision-log records go (shell.Journal).
type Journal interface {
	Append(ctx context.Context, kind string, epoch, round uint64, line []byte) error
}

// A journal append waits JournalWait for the stream's acknowledgement and is
// tried again every JournalRetry until JournalGiveUp has passed; then the
// round goes ahead without its record (counted and logged; the file log
// still has the line). A JetStream cluster elects a new stream leader in
// about 2 s, well inside it.
const (
	JournalWait   = 2 * time.Second
	JournalRetry  = 250 * time.Millisecond
	JournalGiveUp = 10 * time.Second
	// GateWait bounds how late a close goes out for its record: past it
	// the fleet goes on (a JetStream cluster's new leader usually takes
	// 2-6 s; robots' software waits about 10 s for a round).
	GateWait = 8 * time.Second
)

// Metrics are the coordinator's Prometheus series.
type Metrics struct {
	RoundLatency prometheus.Histogram
	Rounds       prometheus.Counter
	Held         prometheus.Counter
	Guessed      prometheus.Counter
	Late         prometheus.Counter
	Dropped      *prometheus.CounterVec
	NATSErrors   *prometheus.CounterVec
	OrderSize    prometheus.Gauge
	JournalFails prometheus.Counter
}

// NewMetrics registers the series on reg (nil: a private registry).
func NewMetrics(reg prometheus.Registerer) *Metrics {
	m := &Metrics{
		RoundLatency: prometheus.NewHistogram(prometheus.HistogramOpts{Name: "baton_round_latency_seconds",
			Help: "From round start to the last decision (or the close, when one was missing).", Buckets: prometheus.ExponentialBuckets(0.0001, 2, 18)}),
		Rounds:     prometheus.NewCounter(prometheus.CounterOpts{Name: "baton_rounds_total", Help: "Rounds closed."}),
		Held:       prometheus.NewCounter(prometheus.CounterOpts{Name: "baton_robots_held_total", Help: "Robot-rounds without a decision (the robot holds)."}),
		Guessed:    prometheus.NewCounter(prometheus.CounterOpts{Name: "baton_turns_guessed_total", Help: "Turns decided with at least one guessed predecessor."}),
		Late:       prometheus.NewCounter(prometheus.CounterOpts{Name: "baton_coordinator_late_decisions_total", Help: "Valid decisions that arrived after their round closed."}),
		Dropped:    prometheus.NewCounterVec(prometheus.CounterOpts{Name: "baton_coordinator_dropped_total", Help: "Messages dropped unread, by reason."}, []string{"reason"}),
		NATSErrors: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "baton_nats_client_errors_total", Help: "Asynchronous NATS client errors, by kind (slow-consumer, permission, other)."}, []string{"kind"}),
		OrderSize:  prometheus.NewGauge(prometheus.GaugeOpts{Name: "baton_order_size", Help: "Robots in the current round's order."}),
		JournalFails: prometheus.NewCounter(prometheus.CounterOpts{Name: "baton_decision_log_stream_failures_total",
			Help: "Decision-log records the durable stream did not take after every retry."}),
	}
	for _, r := range turn.Reasons() {
		m.Dropped.WithLabelValues(string(r))
	}
	if reg == nil {
		reg = prometheus.NewRegistry()
	}
	reg.MustRegister(m.RoundLatency, m.Rounds, m.Held, m.Guessed, m.Late, m.Dropped, m.NATSErrors, m.OrderSize, m.JournalFails)
	return m
}

// Hub is a running coordinator.
type Hub struct {
	cfg     Config
	bus     shell.Bus
	machine *clock.Machine
	start   time.Time // the machine's clock counts from here
	timers  chan struct{}
	models  chan uint64
	done    chan struct{}
	drops   shell.Drops
	alive   []int
	subs    shell.SubDrops

	// The durable log is written by its own goroutine (jobs, in order), so
	// the event loop never waits on it. Messages wait instead: outbox holds
	// them, in order, behind gates, the rounds whose write-ahead record
	// has not been stored yet; acks says which gate was.
	jobs    chan journalJob
	acks    chan uint64
	gateDue chan uint64 // gates held GateWait: the messages go out anyway
	outbox  []outItem
}

type journalJob struct {
	line Line
	gate uint64 // the round whose messages wait for this record (0: none)
}

// outItem is a message held back, or (act nil) a gate.
type outItem struct {
	act  clock.Action
	gate uint64
}

// JournalQueue bounds the records waiting for the durable log; past it a
// record is dropped and counted (the stream has been down for minutes).
const JournalQueue = 1024

// New prepares a hub on a bus. cfg.Clock must pass Validate; an epoch of 0
// is set from the wall clock (microseconds: larger for a restarted
// coordinator, and exact in JSON readers that hold numbers as doubles).
func New(cfg Config, bus shell.Bus) *Hub {
	if cfg.Log == nil {
		cfg.Log = zap.NewNop()
	}
	if cfg.Metrics == nil {
		cfg.Metrics = NewMetrics(nil)
	}
	now := time.Now()
	if cfg.Clock.Epoch == 0 {
		cfg.Clock.Epoch = uint64(now.UnixMicro())
	}
	// With a durable log, closes wait for their round's record: the
	// machine then times the report wait from each close's publication.
	cfg.Clock.ConfirmCloses = cfg.Journal != nil
	if cfg.JournalGiveUp <= 0 {
		cfg.JournalGiveUp = JournalGiveUp
	}
	if cfg.GateWait <= 0 {
		cfg.GateWait = GateWait
	}
	return &Hub{cfg: cfg, bus: bus, machine: clock.New(cfg.Clock), start: now, timers: make(chan struct{}, 1),
		models: make(chan uint64, 4), done: make(chan struct{}), drops: shell.Drops{Log: cfg.Log, Counter: cfg.Metrics.Dropped}}
}

// Epoch is this run's epoch.
func (h *Hub) Epoch() uint64 { return h.cfg.Clock.Epoch }

// SetModelVersion names the guess model robots should fetch and use from
// the next round start on. Safe from any goroutine.
func (h *Hub) SetModelVersion(v uint64) {
	select {
	case h.models <- v:
	case <-h.done:
	}
}

func (h *Hub) now() time.Duration { return time.Since(h.start) }

// Run plays rounds until Rounds are done or ctx ends; on ctx's end the
// round in play is logged as interrupted.
func (h *Hub) Run(ctx context.Context) error {
	defer close(h.done)
	decisions := make(chan *nats.Msg, DecisionPending)
	reports := make(chan *nats.Msg, ReportPending)
	for _, s := range []struct {
		subject string
		ch      chan *nats.Msg
	}{{h.cfg.Subjects.Decision, decisions}, {h.cfg.Subjects.Obs, reports}} {
		sub, err := h.bus.ChanSubscribe(s.subject, s.ch)
		if err != nil {
			return fmt.Errorf("subscribe %s: %w", s.subject, err)
		}
		defer sub.Unsubscribe()
		h.subs.Add(sub)
	}
	if err := h.bus.Flush(); err != nil {
		return fmt.Errorf("nats flush: %w", err)
	}
	if h.cfg.Journal != nil {
		h.jobs, h.acks, h.gateDue = make(chan journalJob, JournalQueue), make(chan uint64, JournalQueue), make(chan uint64, JournalQueue)
		written := make(chan struct{})
		go h.journalWriter(written)
		defer func() {
			close(h.jobs)
			select { // what is queued gets its tries, within bounds
			case <-written:
			case <-time.After(h.cfg.JournalGiveUp + JournalWait):
				h.cfg.Log.Error("decision log stream: records still queued at exit were not stored")
			}
		}()
	}
	h.cfg.Log.Info("run begins", zap.Uint64("epoch", h.cfg.Clock.Epoch))
	begin := append(h.machine.Step(clock.Begin{Now: h.now()}), h.members(true)...)
	if done, err := h.apply(begin); done || err != nil {
		return err
	}
	members := time.NewTicker(MembersEvery)
	defer members.Stop()
	second := time.NewTicker(time.Second)
	defer second.Stop()
	for {
		var acts []clock.Action
		select {
		case <-ctx.Done():
			_, err := h.apply(h.machine.Step(clock.Stop{Now: h.now()}))
			return err
		case <-h.timers:
			// Rounds start on ticks and reports: membership must be
			// current then, not up to MembersEvery old.
			acts = append(h.members(false), h.machine.Step(clock.Tick{Now: h.now()})...)
		case msg := <-decisions:
			d, err := wire.Decision(msg.Data)
			if err != nil {
				h.drops.Drop(string(wire.Reason(err)), msg.Subject, err.Error())
				continue
			}
			acts = h.machine.Step(clock.GotDecision{Now: h.now(), Subject: h.cfg.Subjects.RobotOf(msg.Subject), Msg: d})
		case msg := <-reports:
			o, err := wire.Report(msg.Data)
			if err != nil {
				h.drops.Drop(string(wire.Reason(err)), msg.Subject, err.Error())
				continue
			}
			acts = append(h.members(false), h.machine.Step(clock.GotReport{Now: h.now(), Subject: h.cfg.Subjects.RobotOf(msg.Subject), Msg: o})...)
		case v := <-h.models:
			acts = h.machine.Step(clock.SetModel{Now: h.now(), Version: v})
		case round := <-h.acks:
			var err error
			if acts, err = h.release(round); err != nil {
				return err
			}
		case round := <-h.gateDue:
			if slices.ContainsFunc(h.outbox, func(o outItem) bool { return o.act == nil && o.gate == round }) {
				h.cfg.Log.Warn("decision log stream is slow: the round's close goes out before its record is stored (a coordinator lost now could number this round again)",
					zap.Uint64("round", round), zap.Duration("waited", h.cfg.GateWait))
			}
			var err error
			if acts, err = h.release(round); err != nil {
				return err
			}
		case <-members.C:
			acts = h.members(false)
		case <-second.C:
			h.subs.Count(h.cfg.Metrics.Dropped)
			continue
		}
		if done, err := h.apply(acts); done || err != nil {
			return err
		}
	}
}

// members tells the machine gossip's live set when it changed (or always,
// with force). It is read before every report and tick, since either may
// start a round: a robot that joined a moment ago must be in its order.
func (h *Hub) members(force bool) []clock.Action {
	var alive []int
	switch {
	case !h.bus.Connected():
		// Cut off from the bus, no robot can hear a round: starting them
		// would only run rounds everyone holds, ahead of the robots.
	case h.cfg.Alive == nil:
		alive = make([]int, h.cfg.Clock.Model.Robots())
		for i := range alive {
			alive[i] = i
		}
	default:
		alive = h.cfg.Alive()
		sort.Ints(alive)
	}
	if !force && slices.Equal(alive, h.alive) {
		return nil
	}
	h.alive = alive
	return h.machine.Step(clock.Members{Now: h.now(), Alive: alive})
}

// apply carries out the machine's actions; done is true once every round
// asked for is filed.
func (h *Hub) apply(acts []clock.Action) (done bool, err error) {
	// Messages first, in order: a round's latency runs from the moment the
	// machine starts it, and writing the previous round's log line (often
	// in the same batch) must not sit in between.
	// A round's decisions reach the durable log before its close goes out
	// (and so before anything after it): a successor coordinator then
	// never numbers a round robots acted on a second time.
	for _, a := range acts {
		if c, ok := a.(clock.Closed); ok && h.jobs != nil {
			h.enqueue(journalJob{line: Line{Record: c.Record, StartedAt: h.start.Add(c.Record.Start), Kind: shell.JournalClosed}, gate: c.Record.Round})
		}
	}
	rest := acts[:0:0]
	var sentNow []uint64 // closes that went out at once (no record to wait for)
	for _, a := range acts {
		switch a.(type) {
		case clock.SendStart, clock.SendClose, clock.SendHello:
			if len(h.outbox) > 0 { // a gate holds it: empty, or a gate first
				h.outbox = append(h.outbox, outItem{act: a})
				continue
			}
			if done, err = h.act(a); err != nil {
				return done, err
			}
			if c, ok := a.(clock.SendClose); ok && !c.Repeat {
				sentNow = append(sentNow, c.Msg.Round)
			}
		default:
			rest = append(rest, a)
		}
	}
	for _, a := range rest {
		d, err := h.act(a)
		done = done || d
		if err != nil {
			return done, err
		}
	}
	if h.cfg.Clock.ConfirmCloses {
		for _, r := range sentNow {
			d, err := h.apply(h.machine.Step(clock.CloseSent{Now: h.now(), Round: r}))
			done = done || d
			if err != nil {
				return done, err
			}
		}
	}
	return done, nil
}

// act carries out one action; done is true once every round asked for is
// filed.
func (h *Hub) act(a clock.Action) (done bool, err error) {
	switch a := a.(type) {
	case clock.SendStart:
		err = h.publish(h.cfg.Subjects.Round, "round start", a.Msg.Round, func() ([]byte, error) { return wire.EncodeStart(a.Msg) })
		h.cfg.Metrics.OrderSize.Set(float64(len(a.Msg.Order)))
	case clock.SendClose:
		err = h.publish(h.cfg.Subjects.Close, "round close", a.Msg.Round, func() ([]byte, error) { return wire.EncodeClose(a.Msg) })
	case clock.SendHello:
		if e := h.publish(h.cfg.Subjects.Hello, "report request", h.machine.Round(), func() ([]byte, error) { return wire.EncodeHello(a.Msg) }); e != nil {
			h.cfg.Log.Warn("asking robots for reports", zap.Error(e))
		}
	case clock.Arm:
		d := a.At - h.now()
		time.AfterFunc(max(d, 0), func() {
			select {
			case h.timers <- struct{}{}:
			default: // a tick is already due: it covers this one
			}
		})
	case clock.Closed:
		r := a.Record
		h.cfg.Metrics.Rounds.Inc()
		h.cfg.Metrics.Held.Add(float64(len(r.Held)))
		h.cfg.Metrics.RoundLatency.Observe(float64(r.LatencyUs) / 1e6)
		for _, d := range r.Decisions {
			if len(d.Guessed) > 0 {
				h.cfg.Metrics.Guessed.Inc()
			}
		}
		h.cfg.Log.Debug("round closed", zap.Uint64("round", r.Round), zap.Ints("order", r.Order), zap.Ints("held", r.Held),
			zap.Uint64("latency_us", r.LatencyUs))
	case clock.Filed:
		h.file(a.Record)
	case clock.Late:
		h.cfg.Metrics.Late.Inc()
	case clock.Note:
		fields := []zap.Field{zap.Uint64("round", a.Round)}
		if a.Robot >= 0 {
			fields = append(fields, zap.Int("robot", a.Robot))
		}
		if a.Warn {
			h.cfg.Log.Warn(a.Text, fields...)
		} else {
			h.cfg.Log.Info(a.Text, fields...)
		}
	case clock.Drop:
		h.drops.Drop(string(a.Reason), a.Sender, a.Detail)
	case clock.Finished:
		done = true
	}
	return done, err
}

func (h *Hub) publish(subject, what string, round uint64, encode func() ([]byte, error)) error {
	data, err := encode()
	if err == nil {
		err = h.bus.Publish(subject, data)
	}
	if err != nil {
		return fmt.Errorf("publish %s (round %d): %w", what, round, err)
	}
	return nil
}

// file writes a round's decision-log line, flushed, so a run that is
// killed has written every round it completed.
func (h *Hub) file(r clock.Record) {
	if !r.Interrupted && h.jobs != nil {
		h.enqueue(journalJob{line: Line{Record: r, StartedAt: h.start.Add(r.Start)}})
	}
	if h.cfg.DecisionLog != nil {
		line, err := json.Marshal(Line{Record: r, StartedAt: h.start.Add(r.Start)})
		if err == nil {
			_, err = h.cfg.DecisionLog.Write(append(line, '\n'))
		}
		if f, ok := h.cfg.DecisionLog.(interface{ Flush() error }); ok && err == nil {
			err = f.Flush()
		}
		if err != nil {
			h.cfg.Log.Error("decision log write failed", zap.Uint64("round", r.Round), zap.Error(err))
		}
	}
	if h.cfg.OnRound != nil && !r.Interrupted {
		h.cfg.OnRound(r)
	}
}

// enqueue hands a record to the journal writer; a gated one holds back the
// messages that follow until it is stored (or given up on).
func (h *Hub) enqueue(j journalJob) {
	select {
	case h.jobs <- j:
		if j.gate != 0 {
			h.outbox = append(h.outbox, outItem{gate: j.gate})
			r := j.gate
			time.AfterFunc(h.cfg.GateWait, func() {
				select {
				case h.gateDue <- r:
				case <-h.done:
				}
			})
		}
	default:
		h.cfg.Metrics.JournalFails.Inc()
		h.cfg.Log.Error("decision log stream: queue full, record dropped (the stream has not taken records for a long time)",
			zap.Uint64("round", j.line.Round))
	}
}

// journalWriter stores queued records in order and acknowledges gates.
func (h *Hub) journalWriter(done chan<- struct{}) {
	defer close(done)
	for j := range h.jobs {
		h.journal(j.line)
		if j.gate != 0 {
			h.acks <- j.gate // never blocks: at most JournalQueue gates are out
		}
	}
}

// release lifts round's gate and sends the messages it held, up to the
// next gate; a close that goes out late tells the machine when.
func (h *Hub) release(round uint64) ([]clock.Action, error) {
	i := slices.IndexFunc(h.outbox, func(o outItem) bool { return o.act == nil && o.gate == round })
	if i < 0 {
		return nil, nil // already let go (GateWait), or stored after that
	}
	h.outbox = slices.Delete(h.outbox, i, i+1)
	if i > 0 {
		return nil, nil // an earlier round's gate still holds what follows
	}
	var acts []clock.Action
	var closed []uint64
	for len(h.outbox) > 0 && h.outbox[0].act != nil {
		a := h.outbox[0].act
		h.outbox = h.outbox[1:]
		if c, ok := a.(clock.SendClose); ok {
			if c.Repeat && slices.Contains(closed, c.Msg.Round) {
				continue // the copies that piled up: the close just went out
			}
			closed = append(closed, c.Msg.Round)
		}
		if _, err := h.act(a); err != nil {
			return acts, err
		}
	}
	for _, r := range closed {
		acts = append(acts, h.machine.Step(clock.CloseSent{Now: h.now(), Round: r})...)
	}
	return acts, nil
}

// journal appends one record to the durable log, retrying; a record that
// cannot be stored is logged and counted, and the fleet goes on.
func (h *Hub) journal(l Line) {
	kind := l.Kind
	if kind == "" {
		kind = shell.JournalFiled
	}
	data, err := json.Marshal(l)
	for start := time.Now(); data != nil; {
		ctx, cancel := context.WithTimeout(context.Background(), JournalWait)
		err = h.cfg.Journal.Append(ctx, kind, l.Epoch, l.Round, data)
		cancel()
		if err == nil {
			return
		}
		if time.Since(start)+JournalRetry > h.cfg.JournalGiveUp {
			break
		}
		time.Sleep(JournalRetry)
	}
	h.cfg.Metrics.JournalFails.Inc()
	h.cfg.Log.Error("decision log stream did not take the round; it goes ahead (the file log, if any, has it)",
		zap.Uint64("round", l.Round), zap.String("kind", kind), zap.Error(err))
}
