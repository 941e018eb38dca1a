package node

import (
	"context"
	"encoding/json"
	"io"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	"go.uber.org/zap"
	"go.uber.org/zap/zaptest/observer"
	"google.golang.org/protobuf/proto"

	"baton/agentd/decide"
	"baton/agentd/turn"
	"baton/deploy/shell"
	pb "baton/proto"
	"baton/sim/harbor"
	"baton/sim/model"
)

// fixed is a stub Computer: always the same control, no compute.
type fixed int

func (f fixed) Turn(model.State, int, []int, uint64, turn.Params) int { return int(f) }

type rig struct {
	n     *Node
	nc    *nats.Conn // the test's own connection
	subj  pb.Subjects
	logs  *observer.ObservedLogs
	met   *Metrics
	m     *harbor.Model
	x     model.State
	dec   chan *pb.Decision
	start func(round uint64, order []uint32, mutate func(*pb.RoundStart))
}

// newRig runs robot 1 of a 4-boat harbor fleet on a real, embedded NATS
// server and gives the test its own connection to poke it with.
func newRig(t *testing.T) *rig { return newRigWith(t, nil) }

// newRigWith is newRig with the node's config adjusted by with.
func newRigWith(t *testing.T, with func(*Config)) *rig {
	t.Helper()
	ns, url, err := shell.EmbeddedNATS("127.0.0.1", 0)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(ns.Shutdown)
	connect := func() *nats.Conn {
		nc, err := nats.Connect(url)
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(nc.Close)
		return nc
	}
	m, _ := harbor.Default(4)
	subj, _ := pb.NewSubjects("baton", "yard")
	core, logs := observer.New(zap.InfoLevel)
	met := NewMetrics(prometheus.NewRegistry())
	cfg := DefaultConfig()
	cfg.Fleet, cfg.Subjects, cfg.Robot, cfg.Sender, cfg.Model, cfg.Digest = "yard", subj, 1, "robot-1", m, "d1"
	cfg.Compute, cfg.Log, cfg.Metrics = fixed(harbor.East), zap.New(core), met
	if with != nil {
		with(&cfg)
	}
	if err := cfg.Validate(); err != nil {
		t.Fatal(err)
	}
	nodeConn := connect()
	if cfg.FetchModel == nil {
		cfg.FetchModel = func(ctx context.Context, v uint64) ([]byte, error) {
			return shell.FetchModel(ctx, nodeConn, shell.ModelBucket("baton", "yard"), v)
		}
	}
	n := New(cfg, shell.NATSBus{Conn: nodeConn})
	// The server has subscriptions of its own (JetStream's API): count ours
	// from here.
	baseSubs := ns.NumSubscriptions()
	ctx, cancel := context.WithCancel(context.Background())
	t.Cleanup(cancel)
	go n.Run(ctx)
	r := &rig{n: n, nc: connect(), subj: subj, logs: logs, met: met, m: m, dec: make(chan *pb.Decision, 16)}
	r.x = m.NewState()
	m.Start(r.x, model.NewRNG(1).Rand)
	sub, _ := r.nc.Subscribe(subj.DecisionOf(1), func(msg *nats.Msg) {
		var d pb.Decision
		if proto.Unmarshal(msg.Data, &d) == nil {
			r.dec <- &d
		}
	})
	t.Cleanup(func() { sub.Unsubscribe() })
	// Let the node's subscriptions reach the server.
	waitFor(t, func() bool { return ns.NumSubscriptions() >= baseSubs+5 })
	r.start = func(round uint64, order []uint32, mutate func(*pb.RoundStart)) {
		ints, reals := m.Flatten(r.x, nil, nil)
		rs := &pb.RoundStart{Fleet: "yard", Round: round, Sender: "coordinator", Order: order,
			DeadlinesUs: []uint64{10e6, 20e6, 30e6, 40e6}[:len(order)], Mode: pb.Mode_MODE_HYBRID,
			State: &pb.Snapshot{Scenario: "harbor", Ints: ints, Reals: reals}, ScenarioDigest: "d1",
			Params: &pb.DecideParams{Samples: 2, Horizon: 2, FleetSeed: 1}}
		if mutate != nil {
			mutate(rs)
		}
		r.pub(subj.Round, rs)
	}
	return r
}

func (r *rig) pub(subject string, msg proto.Message) {
	data, _ := proto.Marshal(msg)
	r.nc.Publish(subject, data)
	r.nc.Flush()
}

func waitFor(t *testing.T, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(5 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatal("condition not met in 5s")
		}
		time.Sleep(5 * time.Millisecond)
	}
}

// Bad input on the real wire: every kind is dropped, counted each time,
// logged once per sender, and the robot still takes its turn afterwards.
func TestBadInputOverNATS(t *testing.T) {
	r := newRig(t)
	r.start(5, []uint32{0, 1, 2}, nil)
	waitFor(t, func() bool { return r.n.Round() == 5 })
	dec := func(d *pb.Decision) { r.pub(r.subj.DecisionOf(int(d.GetRobot())), d) }
	cases := []struct {
		name   string
		reason string
		send   func()
	}{
		{"malformed protobuf", "malformed", func() { r.nc.Publish(r.subj.DecisionOf(0), []byte{0xff, 0xff, 0x01}); r.nc.Flush() }},
		{"another fleet", "foreign", func() { dec(&pb.Decision{Fleet: "dock", Round: 5, Robot: 0, Control: 1}) }},
		{"replayed old round", "stale", func() { dec(&pb.Decision{Fleet: "yard", Round: 3, Robot: 0, Control: 1}) }},
		{"robot not in the order", "not-in-order", func() { dec(&pb.Decision{Fleet: "yard", Round: 5, Robot: 3, Control: 1}) }},
		{"out-of-range control", "out-of-range", func() { dec(&pb.Decision{Fleet: "yard", Round: 5, Robot: 2, Control: 99}) }},
		{"decision on another robot's subject", "wrong-subject", func() {
			r.pub(r.subj.DecisionOf(2), &pb.Decision{Fleet: "yard", Round: 5, Robot: 0, Control: 1})
		}},
		{"oversize decision", "oversize", func() { r.nc.Publish(r.subj.DecisionOf(0), make([]byte, 2<<20)); r.nc.Flush() }},
		{"far-future round start", "future", func() { r.start(5+turn.RoundWindow+1, []uint32{0, 1}, nil) }},
		{"absurd Monte Carlo effort", "out-of-bounds", func() {
			r.start(6, []uint32{0, 1}, func(rs *pb.RoundStart) { rs.Params.Samples = 1 << 31 })
		}},
		{"close with a control that does not exist", "out-of-range", func() {
			r.pub(r.subj.Close, &pb.RoundClose{Fleet: "yard", Round: 5, Controls: []int32{-99, 0, 0, 0}})
		}},
		{"close of a round not started", "future", func() {
			r.pub(r.subj.Close, &pb.RoundClose{Fleet: "yard", Round: 7, Controls: []int32{0, 0, 0, 0}})
		}},
		{"malformed round start", "malformed", func() { r.nc.Publish(r.subj.Round, []byte("not protobuf")); r.nc.Flush() }},
		{"round start for another fleet", "foreign", func() { r.start(6, []uint32{0, 1}, func(rs *pb.RoundStart) { rs.Fleet = "dock" }) }},
		{"round start from another scenario file", "wrong-scenario", func() {
			r.start(6, []uint32{0, 1}, func(rs *pb.RoundStart) { rs.ScenarioDigest = "other" })
		}},
		{"round start with a broken snapshot", "malformed", func() {
			r.start(6, []uint32{0, 1}, func(rs *pb.RoundStart) { rs.State.Ints = rs.State.Ints[:2] })
		}},
	}
	want := map[string]float64{}
	for _, c := range cases {
		for range 2 { // twice: counted twice, logged once
			c.send()
			want[c.reason]++
		}
		reason, n := c.reason, want[c.reason]
		waitFor(t, func() bool { return testutil.ToFloat64(r.met.Dropped.WithLabelValues(reason)) == n })
	}
	if got := r.n.Round(); got != 5 {
		t.Fatalf("a bad round start replaced round 5: now %d", got)
	}
	seen := map[string]int{}
	for _, e := range r.logs.FilterMessageSnippet("dropped message").All() {
		seen[e.ContextMap()["reason"].(string)+"/"+e.ContextMap()["sender"].(string)+"/"+e.ContextMap()["detail"].(string)]++
	}
	for k, c := range seen {
		if c != 1 {
			t.Errorf("logged %d times: %s", c, k)
		}
	}
	// The robot still decides: robot 0's valid decision completes its wait.
	dec(&pb.Decision{Fleet: "yard", Round: 5, Robot: 0, Control: harbor.North, Sender: "robot-0"})
	select {
	case d := <-r.dec:
		if d.GetRound() != 5 || d.GetControl() != harbor.East || len(d.GetHeard()) != 1 || d.GetHeard()[0] != 0 {
			t.Fatalf("decision %v", d)
		}
	case <-time.After(5 * time.Second):
		t.Fatal("robot 1 never decided")
	}
}

// The robot's own software reads its decision and gets "hold": true with a
// reason (and no action) whenever there is nothing valid to do.
func TestLocalInterface(t *testing.T) {
	r := newRig(t)
	srv := httptest.NewServer(r.n.Handler(nil))
	defer srv.Close()
	get := func(q string) View {
		resp, err := http.Get(srv.URL + "/v1/decision" + q)
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		var v View
		json.NewDecoder(resp.Body).Decode(&v)
		return v
	}
	if v := get("?wait=10ms"); !v.Hold || !strings.Contains(v.Reason, "no round started") {
		t.Fatalf("before any round: %+v", v)
	}
	// A hold names no action: software reading only "action" finds none.
	if resp, err := http.Get(srv.URL + "/v1/decision?wait=10ms"); err == nil {
		raw, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		if strings.Contains(string(raw), `"action"`) || strings.Contains(string(raw), `"control"`) || !strings.Contains(string(raw), `"hold":true`) {
			t.Fatalf("a hold reads %s", raw)
		}
	}
	r.start(1, []uint32{1, 0}, nil) // robot 1 goes first: decides at once
	if v := get("?round=1&wait=5s"); v.Hold || v.Control != harbor.East || v.Action != "E" || !v.Decided {
		t.Fatalf("round 1: %+v", v)
	}
	if v := get("?round=9&wait=10ms"); !v.Hold || v.Control != 0 || !strings.Contains(v.Reason, "round 9 has not started") {
		t.Fatalf("future round: %+v", v)
	}
	r.start(2, []uint32{0, 2}, nil) // robot 1 sits this one out
	if v := get("?round=2&wait=5s"); !v.Hold || v.Reason != "not in this round's order" {
		t.Fatalf("sitting out: %+v", v)
	}
	for _, c := range []struct{ q, want string }{{"?round=x", "is not a round number"}, {"?wait=forever", "give a duration"}} {
		resp, _ := http.Get(srv.URL + "/v1/decision" + c.q)
		var e map[string]string
		json.NewDecoder(resp.Body).Decode(&e)
		resp.Body.Close()
		if resp.StatusCode != 400 || !strings.Contains(e["error"], c.want) {
			t.Errorf("%s: %d %v", c.q, resp.StatusCode, e)
		}
	}
	obs := make(chan *pb.Observation, 1)
	sub, _ := r.nc.Subscribe(r.subj.ObsOf(1), func(m *nats.Msg) {
		var o pb.Observation
		proto.Unmarshal(m.Data, &o)
		obs <- &o
	})
	defer sub.Unsubscribe()
	r.nc.Flush()
	for _, c := range []struct{ body, want string }{
		{`{"round":1,"position":-4,"applied":0}`, "bad observation"},
		{`{"round":1,"position":3,"applied":9}`, "applied control 9 is not one of 0..4"},
		{`{"round":1,"position":3,"applied":0,"seen":[{"what":99,"value":1}]}`, "bad observation"},
		{`{"round":1,"pos":3,"position":3,"applied":0}`, "unknown field"},
		{`{"round":1,"pos":3}`, `observation lacks "position"`},
		{`{}`, `observation lacks "round"`},
		{`null`, "must be one JSON object"},
		{`{"round":1,"position":3,"applied":0}{"x":1}`, "must be one JSON object"},
		{`{"round":40,"position":3,"applied":0}`, "report for round 40, but the current round is 2"},
		{`not json`, "must be one JSON object"},
	} {
		resp, err := http.Post(srv.URL+"/v1/observation", "application/json", strings.NewReader(c.body))
		if err != nil {
			t.Fatal(err)
		}
		var e map[string]string
		json.NewDecoder(resp.Body).Decode(&e)
		resp.Body.Close()
		if resp.StatusCode != 400 || !strings.Contains(e["error"], c.want) {
			t.Errorf("%s: %d %v, want %q", c.body, resp.StatusCode, e, c.want)
		}
	}
	resp, err := http.Post(srv.URL+"/v1/observation", "application/json", strings.NewReader(`{"round":1,"position":3,"applied":3,"seen":[{"what":0,"value":-1}]}`))
	if err != nil || resp.StatusCode != 202 {
		t.Fatalf("valid observation refused: %v %v", err, resp.Status)
	}
	resp.Body.Close()
	select {
	case o := <-obs:
		if o.GetRobot() != 1 || o.GetPosition() != 3 || o.GetApplied() != 3 || o.GetFleet() != "yard" {
			t.Fatalf("relayed %v", o)
		}
	case <-time.After(5 * time.Second):
		t.Fatal("observation not relayed")
	}
}

// recording is a stub Computer that hands the test what it was asked with.
type recording chan []int

func (c recording) Turn(_ model.State, _ int, known []int, _ uint64, _ turn.Params) int {
	c <- slices.Clone(known)
	return harbor.East
}

// The fleet's guess source comes from the round start: naming last makes
// robot 1, which does not hear robot 0, use robot 0's control of the
// previous round (base when it held or that round's close was not seen);
// naming none, or one the robot cannot make, uses its --guess fallback.
func TestGuessSourceFromRoundStart(t *testing.T) {
	asked := make(recording, 1)
	r := newRigWith(t, func(c *Config) { c.Compute = asked })
	base := r.m.Base(r.x, 0)
	other := (base + 1) % 5 // a control robot 0's base guess would not give
	params := &pb.DecideParams{Samples: 2, Horizon: 2, FleetSeed: 1}
	d := decide.New(r.m, decide.Config{Samples: 2, Horizon: 2})
	recomputed := func(round int) int {
		c, _ := d.Turn(r.x, 0, []int{-1, -1, -1, -1}, decide.TurnSeed(1, round, 0))
		return c
	}

	guessOf0 := func(round uint64, guess string, mode pb.Mode, deadlines []uint64) int {
		t.Helper()
		r.start(round, []uint32{0, 1}, func(rs *pb.RoundStart) {
			rs.GuessSource, rs.Mode, rs.Params = guess, mode, params
			if deadlines != nil {
				rs.DeadlinesUs = deadlines
			}
		})
		select {
		case known := <-asked:
			return known[0]
		case <-time.After(5 * time.Second):
			t.Fatalf("round %d: robot 1 never computed", round)
		}
		return -1
	}
	closeRound := func(round uint64, ctl0 int32, held []uint32) {
		t.Helper()
		r.pub(r.subj.Close, &pb.RoundClose{Fleet: "yard", Round: round, Sender: "coordinator",
			Controls: []int32{ctl0, harbor.East, 0, 0}, Held: held})
		if v := r.n.Decision(context.Background(), round, 5*time.Second, true); !v.Closed {
			t.Fatalf("round %d did not close", round)
		}
	}
	hybrid := []uint64{1000, 10e6} // robot 0 is silent: robot 1 guesses after 1ms

	if got := guessOf0(1, "last", pb.Mode_MODE_HYBRID, hybrid); got != base {
		t.Errorf("last with no previous round: guessed %d, want base %d", got, base)
	}
	closeRound(1, int32(other), nil)
	if got := guessOf0(2, "last", pb.Mode_MODE_HYBRID, hybrid); got != other {
		t.Errorf("last: guessed %d, want robot 0's previous control %d", got, other)
	}
	closeRound(2, 0, []uint32{0})
	if got := guessOf0(3, "last", pb.Mode_MODE_PARALLEL, nil); got != base {
		t.Errorf("last after robot 0 held: guessed %d, want base %d", got, base)
	}
	closeRound(3, int32(other), nil)
	// Round 5 follows round 3's close, not round 4's: nothing to repeat.
	if got := guessOf0(5, "last", pb.Mode_MODE_PARALLEL, nil); got != base {
		t.Errorf("last with the previous round's close unseen: guessed %d, want base %d", got, base)
	}
	closeRound(5, int32(other), nil)
	if got := guessOf0(6, "", pb.Mode_MODE_PARALLEL, nil); got != base {
		t.Errorf("no source named: guessed %d, want the fallback's (base) %d", got, base)
	}
	for _, name := range []string{"learned", "learned", "oracle"} {
		round := r.n.Round() + 1
		if got := guessOf0(round, name, pb.Mode_MODE_PARALLEL, nil); got != base {
			t.Errorf("%s (cannot make): guessed %d, want the fallback's %d", name, got, base)
		}
	}
	if n := r.logs.FilterMessageSnippet("cannot make").Len(); n != 2 {
		t.Errorf("logged %d substitutions, want one per name (learned, oracle)", n)
	}
	// Recompute reproduces robot 0's own turn (same state, seed, effort)...
	if got, want := guessOf0(10, "recompute", pb.Mode_MODE_PARALLEL, nil), recomputed(10); got != want {
		t.Errorf("recompute guessed %d, robot 0's turn gives %d", got, want)
	}
	// ...unless its own deadline leaves no time: then its fallback, base.
	if got := guessOf0(11, "recompute", pb.Mode_MODE_PARALLEL, []uint64{1, 2}); got != base {
		t.Errorf("recompute past the deadline guessed %d, want the fallback's (base) %d", got, base)
	}
	if recomputed(10) == base || recomputed(11) == base {
		t.Errorf("recompute and base agree in round 10 or 11: pick rounds where they differ")
	}
}

// A fallback of learned with no classifier guesses base and says so once.
func TestUnloadedLearnedFallback(t *testing.T) {
	asked := make(recording, 1)
	r := newRigWith(t, func(c *Config) { c.Compute, c.Guess = asked, "learned" })
	for round := uint64(1); round <= 2; round++ {
		r.start(round, []uint32{0, 1}, func(rs *pb.RoundStart) { rs.Mode = pb.Mode_MODE_PARALLEL })
		select {
		case known := <-asked:
			if want := r.m.Base(r.x, 0); known[0] != want {
				t.Fatalf("round %d: guessed %d, want base %d", round, known[0], want)
			}
		case <-time.After(5 * time.Second):
			t.Fatalf("round %d: robot 1 never computed", round)
		}
	}
	if n := r.logs.FilterMessageSnippet("no classifier loaded").Len(); n != 1 {
		t.Fatalf("said %d times that learned guesses are base, want once", n)
	}
}

// A decision is never served as something to do once it is old: when no
// round has started for Stale, or a later round has, the robot holds.
func TestOldDecisionsHold(t *testing.T) {
	r := newRigWith(t, func(c *Config) { c.Stale = 300 * time.Millisecond })
	r.start(1, []uint32{1, 0}, nil)
	v := r.n.Decision(context.Background(), 0, 5*time.Second, false)
	if v.Hold || v.Control != harbor.East {
		t.Fatalf("fresh decision: %+v", v)
	}
	time.Sleep(400 * time.Millisecond)
	if v := r.n.Decision(context.Background(), 0, 0, false); !v.Hold || v.Control != 0 || !strings.Contains(v.Reason, "coordinator gone?") {
		t.Fatalf("stale decision not held: %+v", v)
	}
	r.start(2, []uint32{1, 0}, nil)
	r.n.Decision(context.Background(), 2, 5*time.Second, false)
	if v := r.n.Decision(context.Background(), 1, 0, false); !v.Hold || !strings.Contains(v.Reason, "round 1 is over; the current round is 2") {
		t.Fatalf("old round not held: %+v", v)
	}
	// A restarted coordinator (new epoch) numbers from 1 again: the robot
	// starts over instead of dropping those rounds as stale.
	r.start(1, []uint32{1, 0}, func(rs *pb.RoundStart) { rs.Epoch = 99 })
	waitFor(t, func() bool { return r.n.Round() == 1 })
	if v := r.n.Decision(context.Background(), 1, 5*time.Second, false); v.Hold || !v.Decided {
		t.Fatalf("round 1 of a new epoch: %+v", v)
	}
}

// blocking is a stub Computer that waits for the test before answering.
type blocking struct {
	entered chan struct{}
	release chan struct{}
}

func (b blocking) Turn(model.State, int, []int, uint64, turn.Params) int {
	b.entered <- struct{}{}
	<-b.release
	return harbor.East
}

// A flood of junk while the daemon is busy: every message is accounted
// for, either dropped by the machine for its reason or dropped by the
// client because the daemon fell behind (slow-consumer); none is lost
// silently.
func TestFloodIsCounted(t *testing.T) {
	b := blocking{entered: make(chan struct{}), release: make(chan struct{})}
	r := newRigWith(t, func(c *Config) { c.Compute = b })
	r.start(1, []uint32{1, 0}, nil)
	<-b.entered // the loop is busy computing robot 1's turn
	const flood = DecisionPending + 3000
	for i := range flood {
		r.nc.Publish(r.subj.DecisionOf(i%4), []byte{0xff, byte(i)})
	}
	r.nc.Flush()
	time.Sleep(200 * time.Millisecond) // let the client deliver what it can
	close(b.release)
	total := func() float64 {
		var n float64
		for _, reason := range turn.Reasons() {
			n += testutil.ToFloat64(r.met.Dropped.WithLabelValues(string(reason)))
		}
		return n
	}
	deadline := time.Now().Add(10 * time.Second)
	for total() < flood && time.Now().Before(deadline) {
		time.Sleep(20 * time.Millisecond)
	}
	slow := testutil.ToFloat64(r.met.Dropped.WithLabelValues("slow-consumer"))
	malformed := testutil.ToFloat64(r.met.Dropped.WithLabelValues("malformed"))
	if total() != flood || slow == 0 || malformed == 0 {
		t.Fatalf("sent %d, counted %g (slow-consumer %g, malformed %g)", flood, total(), slow, malformed)
	}
	t.Logf("%d junk decisions: %g dropped by the client (slow-consumer), %g malformed", flood, slow, malformed)
	// And the robot is still in the fleet: it decides the next round.
	r.start(2, []uint32{0, 1}, func(rs *pb.RoundStart) { rs.Mode = pb.Mode_MODE_PARALLEL })
	go func() { <-b.entered }()
	if v := r.n.Decision(context.Background(), 2, 5*time.Second, false); v.Hold {
		t.Fatalf("%+v", v)
	}
}

// /healthz tells a robot that holds from one that can act, and why.
func TestHealth(t *testing.T) {
	r := newRigWith(t, func(c *Config) { c.Stale = 300 * time.Millisecond })
	srv := httptest.NewServer(r.n.Handler(nil))
	defer srv.Close()
	health := func() (int, string) {
		resp, err := http.Get(srv.URL + "/healthz")
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		b, _ := io.ReadAll(resp.Body)
		return resp.StatusCode, string(b)
	}
	if code, body := health(); code != 200 || !strings.Contains(body, "waiting for the first round") {
		t.Fatal(code, body)
	}
	r.start(1, []uint32{1, 0}, nil)
	waitFor(t, func() bool { return r.n.Round() == 1 })
	if code, body := health(); code != 200 || body != "ok robot 1 fleet yard run 0 round 1\n" {
		t.Fatalf("%d %q", code, body)
	}
	// Only far-future round starts arrive: the robot holds, and says so.
	for round := uint64(1000); round < 1002; round++ {
		r.start(round, []uint32{1, 0}, nil)
	}
	time.Sleep(400 * time.Millisecond)
	if code, body := health(); code != 503 || !strings.Contains(body, "holding") {
		t.Fatalf("%d %q", code, body)
	}
	// The run keeps coming: followed again.
	r.start(1002, []uint32{1, 0}, nil)
	waitFor(t, func() bool { return r.n.Round() == 1002 })
	if code, _ := health(); code != 200 {
		t.Fatal(code)
	}
}

// A coordinator's report request makes the daemon re-send its robot's
// latest report, no more often than turn.HelloGap.
func TestReportResent(t *testing.T) {
	r := newRig(t)
	got := make(chan *pb.Observation, 8)
	sub, _ := r.nc.Subscribe(r.subj.ObsOf(1), func(m *nats.Msg) {
		var o pb.Observation
		proto.Unmarshal(m.Data, &o)
		got <- &o
	})
	defer sub.Unsubscribe()
	r.nc.Flush()
	if err := r.n.Observe(Report{Round: 0, Position: 23}); err != nil {
		t.Fatal(err)
	}
	<-got
	for range 3 {
		r.pub(r.subj.Hello, &pb.ReportRequest{Fleet: "yard", Epoch: 5, Sender: "coordinator"})
	}
	select {
	case o := <-got:
		if o.GetPosition() != 23 || o.GetRobot() != 1 {
			t.Fatalf("%v", o)
		}
	case <-time.After(5 * time.Second):
		t.Fatal("report not re-sent")
	}
	waitFor(t, func() bool { return testutil.ToFloat64(r.met.Dropped.WithLabelValues("too-frequent")) == 2 })
	if len(got) != 0 {
		t.Fatal("re-sent more than once within the gap")
	}
}

// Bound beyond localhost, the local interface wants its token on every
// request but health probes.
func TestRequireToken(t *testing.T) {
	h := RequireToken(http.HandlerFunc(func(w http.ResponseWriter, _ *http.Request) { io.WriteString(w, "ok") }), "0123456789abcdef")
	for _, c := range []struct {
		path, auth string
		code       int
	}{
		{"/v1/decision", "", 401}, {"/v1/decision", "Bearer wrong-token-000000", 401},
		{"/v1/decision", "Bearer 0123456789abcdef", 200}, {"/metrics", "", 401}, {"/healthz", "", 200},
	} {
		rec := httptest.NewRecorder()
		req := httptest.NewRequest("GET", c.path, nil)
		if c.auth != "" {
			req.Header.Set("Authorization", c.auth)
		}
		h.ServeHTTP(rec, req)
		if rec.Code != c.code {
			t.Errorf("%s with %q: %d, want %d", c.path, c.auth, rec.Code, c.code)
		}
	}
	for addr, want := range map[string]bool{"127.0.0.1:7400": true, "localhost:1": true, "[::1]:2": true, "0.0.0.0:7400": false, ":7400": false, "10.0.0.5:7400": false} {
		if Loopback(addr) != want {
			t.Errorf("Loopback(%q) = %v", addr, !want)
		}
	}
	dir := t.TempDir()
	for content, ok := range map[string]bool{"0123456789abcdef\n": true, "short": false, "two words here!!!!": false} {
		p := filepath.Join(dir, "tok")
		os.WriteFile(p, []byte(content), 0o600)
		if _, err := ReadToken(p); (err == nil) != ok {
			t.Errorf("token %q: %v", content, err)
		}
	}
}
