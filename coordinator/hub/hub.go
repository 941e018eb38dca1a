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
	Metrics *Metrics
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

// Journal appends are retried this often, each waiting this long, before
// the round goes ahead without its record (counted and logged): the fleet
// keeps deciding through a JetStream leader election, and the file log
// still has the line.
const (
	JournalTries = 3
	JournalWait  = 2 * time.Second
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
}

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
	if h.cfg.Alive == nil {
		alive = make([]int, h.cfg.Clock.Model.Robots())
		for i := range alive {
			alive[i] = i
		}
	} else {
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
	// A round's decisions reach the durable log before its close goes out:
	// a successor coordinator then never numbers a round robots acted on
	// a second time.
	for _, a := range acts {
		if c, ok := a.(clock.Closed); ok {
			h.journal(Line{Record: c.Record, StartedAt: h.start.Add(c.Record.Start), Kind: shell.JournalClosed})
		}
	}
	rest := acts[:0:0]
	for _, a := range acts {
		switch a.(type) {
		case clock.SendStart, clock.SendClose, clock.SendHello:
			if done, err = h.act(a); err != nil {
				return done, err
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
	if !r.Interrupted {
		h.journal(Line{Record: r, StartedAt: h.start.Add(r.Start)})
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

// journal appends one record to the durable log, retrying; a record that
// cannot be stored is logged and counted, and the fleet goes on.
func (h *Hub) journal(l Line) {
	if h.cfg.Journal == nil {
		return
	}
	kind := l.Kind
	if kind == "" {
		kind = shell.JournalFiled
	}
	data, err := json.Marshal(l)
	for try := 0; data != nil && try < JournalTries; try++ {
		if try > 0 {
			time.Sleep(time.Duration(try) * 100 * time.Millisecond) // a leader election takes a moment
		}
		ctx, cancel := context.WithTimeout(context.Background(), JournalWait)
		err = h.cfg.Journal.Append(ctx, kind, l.Epoch, l.Round, data)
		cancel()
		if err == nil {
			return
		}
	}
	h.cfg.Metrics.JournalFails.Inc()
	h.cfg.Log.Error("decision log stream did not take the round; it goes ahead (the file log, if any, has it)",
		zap.Uint64("round", l.Round), zap.String("kind", kind), zap.Error(err))
}
