// Package hub is the coordinator's shell: the round clock, the fleet state
// built from robot reports, the order kept from live membership, and the
// decision log. coordinator's main runs it; tests run it in-process.
package hub

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"slices"
	"sort"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"go.uber.org/zap"
	"google.golang.org/protobuf/proto"

	"baton/agentd/turn"
	"baton/deploy/shell"
	pb "baton/proto"
	"baton/sim/model"
)

// Config of a coordinator.
type Config struct {
	Fleet    string
	Sender   string
	Subjects pb.Subjects
	Model    model.Fleet
	Digest   string
	Params   *pb.DecideParams
	Mode     turn.Mode
	// Guess names the fleet's guess source (signal.Names), sent in every
	// round start; robots that cannot make it use their own fallback.
	Guess string
	// TurnBudget is the time each turn gets: turn k is due (k+1) x TurnBudget
	// after the round starts.
	TurnBudget time.Duration
	// Period: rounds start at most this often (0: as soon as the previous
	// round's reports are in).
	Period time.Duration
	// Rounds to run (0: until ctx ends).
	Rounds int
	// ReportWait bounds the wait for robots' reports after a round.
	ReportWait time.Duration
	// Order is the preferred turn order (nil: 0..m-1); robots that are not
	// alive are skipped.
	Order []int
	// Alive lists live robot ids (nil: every robot is taken as alive).
	Alive func() []int
	// AutoParallel switches a round to parallel mode when the link monitor
	// says a sequential round cannot fit the period.
	AutoParallel bool
	Log          *zap.Logger
	// DecisionLog receives one JSON line per round; flushed per round.
	DecisionLog io.Writer
	Metrics     *Metrics
	// OnRound is called after each round closes (progress output).
	OnRound func(Record)
}

// Record is one decision-log line.
type Record struct {
	Round     uint64     `json:"round"`
	Mode      string     `json:"mode"`
	Guess     string     `json:"guess"`
	Model     uint64     `json:"guess_model_version,omitempty"`
	Order     []int      `json:"order"`
	Controls  []int      `json:"controls"`
	Held      []int      `json:"held"`
	Decisions []Decision `json:"decisions"`
	LatencyUs uint64     `json:"latency_us"`
	Reports   int        `json:"reports"`
	Missing   []int      `json:"missing_reports,omitempty"`
	Stage     float64    `json:"stage_cost"`
	StartedAt time.Time  `json:"started_at"`
	Snapshot  *StateWire `json:"state,omitempty"`
}

// StateWire is the decided-on state, for replaying a log.
type StateWire struct {
	Ints  []int32   `json:"ints"`
	Reals []float64 `json:"reals,omitempty"`
}

// Decision is one robot's decision as logged.
type Decision struct {
	Robot     int      `json:"robot"`
	Control   int      `json:"control"`
	Heard     []uint32 `json:"heard"`
	Guessed   []uint32 `json:"guessed"`
	ComputeUs uint64   `json:"compute_us"`
	HopUs     uint64   `json:"hop_us"`
	AfterUs   uint64   `json:"after_us"`
}

// Metrics are the coordinator's Prometheus series.
type Metrics struct {
	RoundLatency prometheus.Histogram
	Rounds       prometheus.Counter
	Held         prometheus.Counter
	Guessed      prometheus.Counter
	Dropped      *prometheus.CounterVec
	OrderSize    prometheus.Gauge
}

// NewMetrics registers the series on reg (nil: a private registry).
func NewMetrics(reg prometheus.Registerer) *Metrics {
	m := &Metrics{
		RoundLatency: prometheus.NewHistogram(prometheus.HistogramOpts{Name: "baton_round_latency_seconds",
			Help: "From round start to the last decision (or the round's deadline).", Buckets: prometheus.ExponentialBuckets(0.0001, 2, 18)}),
		Rounds:    prometheus.NewCounter(prometheus.CounterOpts{Name: "baton_rounds_total", Help: "Rounds closed."}),
		Held:      prometheus.NewCounter(prometheus.CounterOpts{Name: "baton_robots_held_total", Help: "Robot-rounds without a decision (the robot holds)."}),
		Guessed:   prometheus.NewCounter(prometheus.CounterOpts{Name: "baton_turns_guessed_total", Help: "Turns decided with at least one guessed predecessor."}),
		Dropped:   prometheus.NewCounterVec(prometheus.CounterOpts{Name: "baton_coordinator_dropped_total", Help: "Messages dropped unread, by reason."}, []string{"reason"}),
		OrderSize: prometheus.NewGauge(prometheus.GaugeOpts{Name: "baton_order_size", Help: "Robots in the current round's order."}),
	}
	if reg == nil {
		reg = prometheus.NewRegistry()
	}
	reg.MustRegister(m.RoundLatency, m.Rounds, m.Held, m.Guessed, m.Dropped, m.OrderSize)
	return m
}

// Hub is a running coordinator.
type Hub struct {
	epoch   uint64        // this run's id, sent in every round start
	model   atomic.Uint64 // guess model version robots should use (0: none)
	round   uint64        // the round being played (for filing reports)
	lastOrd []int         // the previous round's order, to log changes
	heldRun map[int]int   // rounds in a row each robot was held
	cfg     Config
	nc      *nats.Conn
	decs    chan *nats.Msg
	obs     chan *nats.Msg
	x       model.State
	monitor *turn.LinkMonitor
	drops   shell.Drops
	// Reports that arrived for a round not being collected yet.
	early map[uint64]map[int]*pb.Observation
}

// New prepares a hub on an open connection.
func New(cfg Config, nc *nats.Conn) *Hub {
	if cfg.Log == nil {
		cfg.Log = zap.NewNop()
	}
	if cfg.Metrics == nil {
		cfg.Metrics = NewMetrics(nil)
	}
	if cfg.TurnBudget <= 0 {
		cfg.TurnBudget = 200 * time.Millisecond
	}
	if cfg.ReportWait <= 0 {
		cfg.ReportWait = 2 * time.Second
	}
	if cfg.Mode == 0 {
		cfg.Mode = turn.Hybrid
	}
	if cfg.Guess == "" {
		cfg.Guess = "base"
	}
	if cfg.Sender == "" {
		cfg.Sender = "coordinator"
	}
	return &Hub{epoch: uint64(time.Now().UnixNano()), heldRun: map[int]int{}, cfg: cfg, nc: nc, decs: make(chan *nats.Msg, 4096), obs: make(chan *nats.Msg, 4096),
		monitor: turn.NewLinkMonitor(0, 0, 0), early: map[uint64]map[int]*pb.Observation{},
		drops: shell.Drops{Log: cfg.Log, Counter: cfg.Metrics.Dropped}}
}

func (h *Hub) drop(reason turn.DropReason, sender, detail string) {
	h.drops.Drop(string(reason), sender, detail)
}

func (h *Hub) alive() []int {
	m := h.cfg.Model.Robots()
	if h.cfg.Alive == nil {
		out := make([]int, m)
		for i := range out {
			out[i] = i
		}
		return out
	}
	var out []int
	for _, r := range h.cfg.Alive() {
		if r >= 0 && r < m {
			out = append(out, r)
		}
	}
	sort.Ints(out)
	return slices.Compact(out)
}

func (h *Hub) order() []int {
	alive := h.alive()
	pref := h.cfg.Order
	if pref == nil {
		pref = make([]int, h.cfg.Model.Robots())
		for i := range pref {
			pref[i] = i
		}
	}
	var out []int
	for _, r := range pref {
		if slices.Contains(alive, r) {
			out = append(out, r)
		}
	}
	return out
}

// SetModelVersion names the guess model robots should fetch and use from
// the next round start on.
func (h *Hub) SetModelVersion(v uint64) { h.model.Store(v) }

// Run plays rounds until Rounds are done or ctx ends.
func (h *Hub) Run(ctx context.Context) error {
	for subj, ch := range map[string]chan *nats.Msg{h.cfg.Subjects.Decision: h.decs, h.cfg.Subjects.Obs: h.obs} {
		sub, err := h.nc.ChanSubscribe(subj, ch)
		if err != nil {
			return fmt.Errorf("subscribe %s: %w", subj, err)
		}
		_ = sub.SetPendingLimits(-1, -1)
		defer sub.Unsubscribe()
	}
	if err := h.nc.Flush(); err != nil {
		return fmt.Errorf("nats flush: %w", err)
	}
	m := h.cfg.Model
	h.x = m.NewState()
	m.Start(h.x, model.NewRNG(0).Rand)

	// Round 0: where is everybody? Wait for at least one report.
	h.cfg.Log.Info("waiting for robots' first reports", zap.Int("robots", m.Robots()))
	var reports map[int]*pb.Observation
	for len(reports) == 0 {
		var err error
		reports, err = h.collectReports(ctx, 0, h.alive())
		if err != nil {
			return err
		}
	}
	for r, o := range reports {
		h.absorb(r, o)
	}
	for _, r := range h.alive() {
		if reports[r] == nil {
			h.cfg.Log.Warn("starting without a report from this robot: it is taken to be at its start position until it reports",
				zap.Int("robot", r))
		}
	}
	for round := uint64(1); h.cfg.Rounds == 0 || round <= uint64(h.cfg.Rounds); round++ {
		next := time.Now().Add(h.cfg.Period)
		rec, err := h.playRound(ctx, round)
		if err != nil {
			return err
		}
		if h.cfg.OnRound != nil {
			h.cfg.OnRound(rec)
		}
		if d := time.Until(next); d > 0 {
			select {
			case <-ctx.Done():
				return nil
			case <-time.After(d):
			}
		}
	}
	return nil
}

func (h *Hub) absorb(r int, o *pb.Observation) {
	seen := make([]model.Sighting, len(o.GetSeen()))
	for i, s := range o.GetSeen() {
		seen[i] = model.Sighting{What: s.GetWhat(), Value: s.GetValue()}
	}
	if err := h.cfg.Model.Absorb(h.x, r, o.GetPosition(), seen); err != nil {
		h.drop(turn.DropMalformed, fmt.Sprint(r), fmt.Sprintf("report for round %d: %v", o.GetRound(), err))
	}
}

func (h *Hub) playRound(ctx context.Context, round uint64) (Record, error) {
	m := h.cfg.Model
	var order []int
	for waited := false; ; waited = true {
		order = h.order()
		if len(order) > 0 {
			break
		}
		if !waited {
			h.cfg.Log.Warn("no live robots; waiting for one to join", zap.Uint64("round", round))
		}
		select {
		case <-ctx.Done():
			return Record{}, ctx.Err()
		case <-time.After(100 * time.Millisecond):
		}
	}
	h.round = round
	h.logOrder(round, order)
	mode := h.cfg.Mode
	if h.cfg.AutoParallel && h.cfg.Period > 0 && mode != turn.Parallel &&
		h.monitor.Suggest(len(order), 0, h.cfg.Period) == turn.Parallel {
		mode = turn.Parallel
	}
	deadlines := make([]uint64, len(order))
	for k := range order {
		deadlines[k] = uint64(time.Duration(k+1) * h.cfg.TurnBudget / time.Microsecond)
	}
	ints, reals := m.Flatten(h.x, nil, nil)
	rs := &pb.RoundStart{Fleet: h.cfg.Fleet, Round: round, Sender: h.cfg.Sender,
		State: &pb.Snapshot{Scenario: m.Name(), Ints: ints, Reals: reals}, Mode: pb.Mode(mode),
		DeadlinesUs: deadlines, Params: h.cfg.Params, ScenarioDigest: h.cfg.Digest, GuessSource: h.cfg.Guess,
		Epoch: h.epoch, GuessModelVersion: h.model.Load()}
	for _, r := range order {
		rs.Order = append(rs.Order, uint32(r))
	}
	data, err := proto.Marshal(rs)
	if err != nil {
		return Record{}, err
	}
	rec := Record{Round: round, Mode: mode.String(), Guess: h.cfg.Guess, Model: rs.GetGuessModelVersion(), Order: order, Controls: make([]int, m.Robots()), Held: []int{},
		StartedAt: time.Now(), Snapshot: &StateWire{Ints: ints, Reals: reals}}
	start := time.Now()
	if err := h.nc.Publish(h.cfg.Subjects.Round, data); err != nil {
		return rec, fmt.Errorf("publish round %d: %w", round, err)
	}
	h.cfg.Metrics.OrderSize.Set(float64(len(order)))

	// Collect decisions until every robot in the order has one or is past
	// its own deadline: a slow robot costs its successors a guess, never
	// the whole round a wait, and the round closes by the last deadline.
	got := map[int]*pb.Decision{}
	tick := time.NewTimer(h.cfg.TurnBudget)
	defer tick.Stop()
	var last time.Time
	for !h.settled(order, deadlines, got, start) {
		select {
		case <-ctx.Done():
			return rec, ctx.Err()
		case <-tick.C:
			tick.Reset(h.nextDeadline(deadlines, start))
		case msg := <-h.decs:
			d, ok := h.checkDecision(msg.Data, round, order, got)
			if ok {
				got[int(d.GetRobot())] = d
				last = time.Now()
				rec.Decisions = append(rec.Decisions, Decision{Robot: int(d.GetRobot()), Control: int(d.GetControl()),
					Heard: orEmpty(d.GetHeard()), Guessed: orEmpty(d.GetGuessed()), ComputeUs: d.GetComputeUs(),
					HopUs: d.GetHopUs(), AfterUs: uint64(last.Sub(start) / time.Microsecond)})
				if d.GetHopUs() > 0 {
					h.monitor.Observe(time.Duration(d.GetHopUs()) * time.Microsecond)
				}
				if len(d.GetGuessed()) > 0 {
					h.cfg.Metrics.Guessed.Inc()
				}
			}
		case msg := <-h.obs:
			h.stash(msg.Data)
		}
	}
	if len(got) < len(order) {
		last = time.Now()
	}
	if last.IsZero() {
		last = time.Now()
	}
	rec.LatencyUs = uint64(last.Sub(start) / time.Microsecond)
	held := []uint32{}
	for r := range m.Robots() {
		if d, ok := got[r]; ok {
			rec.Controls[r] = int(d.GetControl())
		} else {
			rec.Held = append(rec.Held, r)
			held = append(held, uint32(r))
		}
	}
	h.cfg.Metrics.Held.Add(float64(len(rec.Held)))
	h.noteHeld(order, rec.Held)
	h.cfg.Metrics.Rounds.Inc()
	h.cfg.Metrics.RoundLatency.Observe(float64(rec.LatencyUs) / 1e6)
	ctl := make([]int32, len(rec.Controls))
	for i, c := range rec.Controls {
		ctl[i] = int32(c)
	}
	cdata, _ := proto.Marshal(&pb.RoundClose{Fleet: h.cfg.Fleet, Round: round, Sender: h.cfg.Sender, Controls: ctl, Held: held, LatencyUs: rec.LatencyUs})
	if err := h.nc.Publish(h.cfg.Subjects.Close, cdata); err != nil {
		return rec, fmt.Errorf("publish close %d: %w", round, err)
	}

	// The robots act, then report; build the next state from the reports.
	reports, err := h.collectReports(ctx, round, order)
	if err != nil {
		return rec, err
	}
	u := slices.Clone(rec.Controls)
	for r, o := range reports {
		if a := int(o.GetApplied()); a >= 0 && a < m.NumControls(h.x, r) {
			u[r] = a
		}
	}
	rec.Stage = m.Advance(h.x, u)
	rec.Reports = len(reports)
	for _, r := range order {
		if _, ok := reports[r]; !ok {
			rec.Missing = append(rec.Missing, r)
		}
	}
	for _, r := range sortedKeys(reports) {
		h.absorb(r, reports[r])
	}
	if h.cfg.DecisionLog != nil {
		line, _ := json.Marshal(rec)
		if _, err := h.cfg.DecisionLog.Write(append(line, '\n')); err != nil {
			h.cfg.Log.Error("decision log write failed", zap.Error(err))
		}
		if f, ok := h.cfg.DecisionLog.(interface{ Flush() error }); ok {
			_ = f.Flush()
		}
	}
	return rec, nil
}

// settled: every robot in the order decided or is past its deadline.
func (h *Hub) settled(order []int, deadlines []uint64, got map[int]*pb.Decision, start time.Time) bool {
	since := time.Since(start)
	for k, r := range order {
		if got[r] == nil && since < time.Duration(deadlines[k])*time.Microsecond {
			return false
		}
	}
	return true
}

// nextDeadline is the wait until the next turn deadline still ahead.
func (h *Hub) nextDeadline(deadlines []uint64, start time.Time) time.Duration {
	since := time.Since(start)
	for _, d := range deadlines {
		if dd := time.Duration(d) * time.Microsecond; dd > since {
			return dd - since + time.Millisecond
		}
	}
	return time.Millisecond
}

// logOrder says when robots leave or join the order (gossip saw them die
// or come back).
func (h *Hub) logOrder(round uint64, order []int) {
	if h.lastOrd != nil {
		for _, r := range h.lastOrd {
			if !slices.Contains(order, r) {
				h.cfg.Log.Warn("robot left the order (gossip reports it gone)", zap.Int("robot", r), zap.Uint64("round", round))
			}
		}
		for _, r := range order {
			if !slices.Contains(h.lastOrd, r) {
				h.cfg.Log.Info("robot joined the order", zap.Int("robot", r), zap.Uint64("round", round))
			}
		}
	}
	h.lastOrd = slices.Clone(order)
}

// noteHeld warns once when a live robot keeps missing its turn: it is in
// gossip but never decides, which is what a robot started with another
// scenario file (it refuses every round) or a stuck daemon looks like.
func (h *Hub) noteHeld(order, held []int) {
	for _, r := range order {
		if !slices.Contains(held, r) {
			h.heldRun[r] = 0
			continue
		}
		h.heldRun[r]++
		if h.heldRun[r] == 3 {
			h.cfg.Log.Warn("robot is alive but has missed 3 turns in a row; check its log (same scenario file and --robots? slow link?)",
				zap.Int("robot", r))
		}
	}
}

func sortedKeys(m map[int]*pb.Observation) []int {
	var k []int
	for r := range m {
		k = append(k, r)
	}
	sort.Ints(k)
	return k
}

func orEmpty(s []uint32) []uint32 {
	if s == nil {
		return []uint32{}
	}
	return s
}

func (h *Hub) checkDecision(data []byte, round uint64, order []int, got map[int]*pb.Decision) (*pb.Decision, bool) {
	var d pb.Decision
	if err := proto.Unmarshal(data, &d); err != nil {
		h.drop(turn.DropMalformed, "", "decision: "+err.Error())
		return nil, false
	}
	who := fmt.Sprint(d.GetRobot())
	switch {
	case d.GetFleet() != h.cfg.Fleet:
		h.drop(turn.DropForeign, who, fmt.Sprintf("decision for fleet %q", d.GetFleet()))
	case d.GetRound() < round:
		h.drop(turn.DropStale, who, fmt.Sprintf("decision for round %d during round %d", d.GetRound(), round))
	case d.GetRound() > round:
		h.drop(turn.DropFuture, who, fmt.Sprintf("decision for round %d during round %d", d.GetRound(), round))
	case !slices.Contains(order, int(d.GetRobot())):
		h.drop(turn.DropNotInOrder, who, fmt.Sprintf("robot %d is not in round %d's order", d.GetRobot(), round))
	case got[int(d.GetRobot())] != nil:
		h.drop(turn.DropDuplicate, who, fmt.Sprintf("second decision from robot %d in round %d", d.GetRobot(), round))
	case d.GetControl() < 0 || int(d.GetControl()) >= h.cfg.Model.NumControls(h.x, int(d.GetRobot())):
		h.drop(turn.DropMalformed, who, fmt.Sprintf("control %d out of range", d.GetControl()))
	default:
		return &d, true
	}
	return nil, false
}

// stash files a report under its round for collectReports.
func (h *Hub) stash(data []byte) {
	var o pb.Observation
	if err := proto.Unmarshal(data, &o); err != nil {
		h.drop(turn.DropMalformed, "", "report: "+err.Error())
		return
	}
	who := fmt.Sprint(o.GetRobot())
	switch {
	case o.GetFleet() != h.cfg.Fleet:
		h.drop(turn.DropForeign, who, fmt.Sprintf("report for fleet %q", o.GetFleet()))
		return
	case int(o.GetRobot()) >= h.cfg.Model.Robots():
		h.drop(turn.DropMalformed, who, fmt.Sprintf("report from robot %d of a %d-robot fleet", o.GetRobot(), h.cfg.Model.Robots()))
		return
	}
	// Only reports for the round being played or the next are kept (the
	// rest could pile up without bound); before round 1, any report says
	// where a robot is.
	switch {
	case h.round == 0:
		o.Round = 0 // before round 1 a report of any round says where a robot is
	case o.GetRound() < h.round:
		h.drop(turn.DropStale, who, fmt.Sprintf("report for round %d during round %d", o.GetRound(), h.round))
		return
	case o.GetRound() > h.round+1:
		h.drop(turn.DropFuture, who, fmt.Sprintf("report for round %d during round %d", o.GetRound(), h.round))
		return
	}
	byRobot := h.early[o.GetRound()]
	if byRobot == nil {
		byRobot = map[int]*pb.Observation{}
		h.early[o.GetRound()] = byRobot
	}
	if byRobot[int(o.GetRobot())] != nil && o.GetRound() > 0 {
		h.drop(turn.DropDuplicate, who, fmt.Sprintf("second report for round %d", o.GetRound()))
		return
	}
	byRobot[int(o.GetRobot())] = &o
}

func (h *Hub) askReports() {
	data, _ := proto.Marshal(&pb.ReportRequest{Fleet: h.cfg.Fleet, Epoch: h.epoch, Sender: h.cfg.Sender})
	if err := h.nc.Publish(h.cfg.Subjects.Hello, data); err != nil {
		h.cfg.Log.Warn("asking robots for reports", zap.Error(err))
	}
}

// collectReports waits up to ReportWait for reports of round from want.
// For round 0 it waits for every robot but returns early only when all
// live robots reported, so a fleet starts together.
func (h *Hub) collectReports(ctx context.Context, round uint64, want []int) (map[int]*pb.Observation, error) {
	timeout := time.NewTimer(h.cfg.ReportWait)
	defer timeout.Stop()
	var hello <-chan time.Time
	if round == 0 {
		// Ask for reports (again every second): robots whose coordinator
		// restarted re-send their latest one instead of waiting forever.
		h.askReports()
		t := time.NewTicker(time.Second)
		defer t.Stop()
		hello = t.C
	}
	for {
		got := h.early[round]
		have := 0
		for _, r := range want {
			if got[r] != nil {
				have++
			}
		}
		if have == len(want) && (round > 0 || len(got) > 0) {
			break
		}
		select {
		case <-ctx.Done():
			return nil, ctx.Err()
		case <-timeout.C:
			goto done
		case <-hello:
			h.askReports()
		case msg := <-h.obs:
			h.stash(msg.Data)
		case msg := <-h.decs:
			// Late decisions from the closed round are counted, not used.
			h.checkDecision(msg.Data, round+1, nil, nil)
		}
		if round == 0 {
			want = h.alive()
		}
	}
done:
	got := h.early[round]
	for k := range h.early {
		if k <= round {
			delete(h.early, k)
		}
	}
	if got == nil {
		got = map[int]*pb.Observation{}
	}
	return got, nil
}
