package client_test

import (
	"context"
	"errors"
	"net"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"google.golang.org/protobuf/proto"

	"baton/agentd/client"
	"baton/agentd/node"
	"baton/deploy/shell"
	pb "baton/proto"
	"baton/sim/harbor"
	"baton/sim/model"
)

// The tests run against a real agentd local interface: a real agentd/node
// Node (the turn machine, the real rollout) on an in-memory bus, served by
// node.Handler, exactly as agentd serves it. The test plays the
// coordinator by publishing round starts and closes on the bus.

const (
	fleet = "yard"
	epoch = 7
	token = "0123456789abcdef-token"
)

type rig struct {
	t    *testing.T
	n    *node.Node
	bus  *shell.MemBus
	subj pb.Subjects
	m    *harbor.Model
	x    model.State
	h    http.Handler
	srv  *httptest.Server
	obs  chan *nats.Msg // robot 0's observations on the bus
}

// newRig runs robot 0 of a 2-boat harbor fleet and serves its local
// interface (with a token when tok is not empty).
func newRig(t *testing.T, tok string, with func(*node.Config)) *rig {
	t.Helper()
	m, err := harbor.Default(2)
	if err != nil {
		t.Fatal(err)
	}
	subj, err := pb.NewSubjects("baton", fleet)
	if err != nil {
		t.Fatal(err)
	}
	cfg := node.DefaultConfig()
	cfg.Fleet, cfg.Subjects, cfg.Robot, cfg.Sender, cfg.Model, cfg.Digest = fleet, subj, 0, "robot-0", m, "d1"
	if with != nil {
		with(&cfg)
	}
	if err := cfg.Validate(); err != nil {
		t.Fatal(err)
	}
	bus := &shell.MemBus{}
	r := &rig{t: t, bus: bus, subj: subj, m: m, x: m.NewState(), obs: make(chan *nats.Msg, 64)}
	m.Start(r.x, model.NewRNG(1).Rand)
	if _, err := bus.ChanSubscribe(subj.ObsOf(0), r.obs); err != nil {
		t.Fatal(err)
	}
	r.n = node.New(cfg, bus)
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() { defer close(done); r.n.Run(ctx) }()
	t.Cleanup(func() { cancel(); <-done })
	r.h = r.n.Handler(nil)
	if tok != "" {
		r.h = node.RequireToken(r.h, tok)
	}
	r.srv = httptest.NewServer(r.h)
	t.Cleanup(r.srv.Close)
	return r
}

func (r *rig) pub(subject string, msg proto.Message) {
	data, err := proto.Marshal(msg)
	if err != nil {
		r.t.Fatal(err)
	}
	r.bus.Publish(subject, data)
}

// start begins round (of run ep) with the given turn order; the node
// subscribes when Run starts, so the start is sent until it is admitted.
func (r *rig) start(ep, round uint64, order ...uint32) {
	r.t.Helper()
	ints, reals := r.m.Flatten(r.x, nil, nil)
	rs := &pb.RoundStart{Fleet: fleet, Round: round, Sender: "coordinator", Order: order, Epoch: ep,
		DeadlinesUs: []uint64{10e6, 20e6}[:len(order)], Mode: pb.Mode_MODE_HYBRID,
		State: &pb.Snapshot{Scenario: "harbor", Ints: ints, Reals: reals}, ScenarioDigest: "d1",
		Params: &pb.DecideParams{Samples: 2, Horizon: 2, FleetSeed: 1}}
	deadline := time.Now().Add(5 * time.Second)
	for r.n.Round() != round {
		if time.Now().After(deadline) {
			r.t.Fatalf("round %d never started at the node", round)
		}
		r.pub(r.subj.Round, rs)
		time.Sleep(5 * time.Millisecond)
	}
}

func (r *rig) close(round uint64, controls ...int32) {
	r.pub(r.subj.Close, &pb.RoundClose{Fleet: fleet, Round: round, Sender: "coordinator", Controls: controls, Epoch: epoch})
}

func newClient(t *testing.T, url string, opts ...client.Option) *client.Client {
	t.Helper()
	c, err := client.New(url, opts...)
	if err != nil {
		t.Fatal(err)
	}
	return c
}

func ctxFor(t *testing.T, d time.Duration) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), d)
	t.Cleanup(cancel)
	return ctx
}

func TestDecision(t *testing.T) {
	r := newRig(t, "", nil)
	c := newClient(t, r.srv.URL)
	r.start(epoch, 1, 0, 1)
	d, err := c.Decision(ctxFor(t, 10*time.Second), 1)
	if err != nil {
		t.Fatal(err)
	}
	// The node's own answer, for comparison.
	v := r.n.Decision(context.Background(), 1, 0, false)
	if !d.Act || d.Round != 1 || d.Epoch != epoch || d.Control != v.Control || d.Action != v.Action || d.Action == "" || d.Reason != "" || d.Closed {
		t.Fatalf("decision %+v, agentd's view %+v", d, v)
	}
	if len(d.Heard) != 0 || len(d.Guessed) != 0 {
		t.Fatalf("robot 0 has no predecessors: heard %v guessed %v", d.Heard, d.Guessed)
	}
	// Round 0 is the current round.
	if cur, err := c.Decision(ctxFor(t, 5*time.Second), 0); err != nil || cur.Round != 1 || cur.Control != d.Control {
		t.Fatalf("current round: %+v, %v", cur, err)
	}
	// The close, with the fleet's final control for this robot.
	go func() {
		time.Sleep(100 * time.Millisecond)
		r.close(1, int32(harbor.North), 0)
	}()
	cl, err := c.Closed(ctxFor(t, 10*time.Second), 1)
	if err != nil {
		t.Fatal(err)
	}
	if !cl.Act || !cl.Closed || cl.Control != harbor.North || cl.Action != "N" {
		t.Fatalf("closed: %+v", cl)
	}
}

func TestHold(t *testing.T) {
	r := newRig(t, "", nil)
	c := newClient(t, r.srv.URL)
	r.start(epoch, 1, 1) // robot 0 sits this round out
	t0 := time.Now()
	d, err := c.Decision(ctxFor(t, 10*time.Second), 1)
	if err != nil {
		t.Fatal(err)
	}
	if d.Act || d.Control != 0 || d.Action != "" || !strings.Contains(d.Reason, "not in this round's order") || d.Round != 1 {
		t.Fatalf("want a hold with no action: %+v", d)
	}
	// A hold waiting cannot lift comes back at once, not after the wait.
	if el := time.Since(t0); el > 2*time.Second {
		t.Fatalf("the hold took %s", el)
	}
	// A round that is over holds at once too.
	r.start(epoch, 2, 0, 1)
	if d, err := c.Decision(ctxFor(t, 5*time.Second), 1); err != nil || d.Act || !strings.Contains(d.Reason, "is over") {
		t.Fatalf("round 1 after round 2 started: %+v, %v", d, err)
	}
	// Next skips to the current round: round 1 is over.
	if d, err := c.Next(ctxFor(t, 5*time.Second), 0); err != nil || !d.Act || d.Round != 2 {
		t.Fatalf("next after 0: %+v, %v", d, err)
	}
}

func TestNext(t *testing.T) {
	r := newRig(t, "", nil)
	c := newClient(t, r.srv.URL, client.WithWait(200*time.Millisecond))
	type res struct {
		d   client.Decision
		err error
	}
	next := func(after uint64) chan res {
		ch := make(chan res, 1)
		go func() {
			d, err := c.Next(ctxFor(t, 10*time.Second), after)
			ch <- res{d, err}
		}()
		return ch
	}
	get := func(ch chan res, round uint64) client.Decision {
		t.Helper()
		got := <-ch
		if got.err != nil || !got.d.Act || got.d.Round != round {
			t.Fatalf("want round %d's decision: %+v, %v", round, got.d, got.err)
		}
		return got.d
	}
	// Before any round: Next waits (over several polls) for the first.
	ch := next(0)
	time.Sleep(500 * time.Millisecond)
	r.start(epoch, 1, 0, 1)
	get(ch, 1)
	// The next round, once it starts.
	ch = next(1)
	time.Sleep(300 * time.Millisecond)
	r.start(epoch, 2, 0, 1)
	get(ch, 2)
	// Rounds went by: the current one.
	r.start(epoch, 3, 0, 1)
	r.start(epoch, 4, 0, 1)
	get(next(2), 4)
	// A new coordinator run numbering from 1 again.
	r.start(epoch+1, 1, 0, 1)
	if d := get(next(4), 1); d.Epoch != epoch+1 {
		t.Fatalf("epoch %d, want the new run's %d", d.Epoch, epoch+1)
	}
	// A hold for the current round is returned, not waited through.
	r.start(epoch+1, 2, 1)
	if got := <-next(1); got.err != nil || got.d.Act || got.d.Round != 2 || got.d.Reason == "" {
		t.Fatalf("want round 2's hold: %+v, %v", got.d, got.err)
	}
}

// The client rides out an agentd that is down for a moment: connection
// refused, then it comes up on its address.
func TestRetryWhileDown(t *testing.T) {
	r := newRig(t, "", nil)
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	addr := ln.Addr().String()
	ln.Close()
	c := newClient(t, "http://"+addr, client.WithRetry(client.RetryPolicy{Initial: 50 * time.Millisecond, Max: 200 * time.Millisecond, Attempts: 30}))
	if _, err := c.Health(ctxFor(t, time.Second)); !errors.Is(err, client.ErrUnreachable) || !strings.Contains(err.Error(), addr) {
		t.Fatalf("health of a down agentd: %v", err)
	}
	up := make(chan *http.Server, 1)
	go func() {
		time.Sleep(400 * time.Millisecond)
		l, err := net.Listen("tcp", addr)
		if err != nil {
			t.Error(err)
			up <- nil
			return
		}
		srv := &http.Server{Handler: r.h}
		up <- srv
		srv.Serve(l)
	}()
	t.Cleanup(func() {
		if srv := <-up; srv != nil {
			srv.Close()
		}
	})
	t0 := time.Now()
	pos := r.m.Cell(2, 3)
	if err := c.Report(ctxFor(t, 10*time.Second), client.Observation{Round: 0, Position: pos, Applied: 0}); err != nil {
		t.Fatal(err)
	}
	if el := time.Since(t0); el < 300*time.Millisecond {
		t.Fatalf("reported after %s, before agentd was up", el)
	}
	select {
	case msg := <-r.obs:
		var o pb.Observation
		if err := proto.Unmarshal(msg.Data, &o); err != nil || o.Position != pos || o.Robot != 0 {
			t.Fatalf("observation on the bus: %v %v", &o, err)
		}
	case <-time.After(5 * time.Second):
		t.Fatal("agentd never sent the report on")
	}
	r.start(epoch, 1, 0, 1)
	if d, err := c.Decision(ctxFor(t, 10*time.Second), 1); err != nil || !d.Act {
		t.Fatalf("decision after the restart: %+v, %v", d, err)
	}

	// A decision wait also rides out the outage.
	ln2, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	addr2 := ln2.Addr().String()
	ln2.Close()
	c2 := newClient(t, "http://"+addr2, client.WithRetry(client.RetryPolicy{Initial: 50 * time.Millisecond, Max: 200 * time.Millisecond, Attempts: 1}))
	go func() {
		time.Sleep(400 * time.Millisecond)
		l, err := net.Listen("tcp", addr2)
		if err != nil {
			t.Error(err)
			return
		}
		srv := &http.Server{Handler: r.h}
		t.Cleanup(func() { srv.Close() })
		srv.Serve(l)
	}()
	if d, err := c2.Decision(ctxFor(t, 10*time.Second), 1); err != nil || !d.Act || d.Round != 1 {
		t.Fatalf("decision across the outage: %+v, %v", d, err)
	}

	// With agentd gone for good, Report gives up after its attempts.
	c3 := newClient(t, "http://"+addr, client.WithRetry(client.RetryPolicy{Initial: 10 * time.Millisecond, Max: 20 * time.Millisecond, Attempts: 3}))
	if srv := <-up; srv != nil {
		srv.Close()
	}
	up <- nil
	err = c3.Report(ctxFor(t, 10*time.Second), client.Observation{Round: 1, Position: pos})
	if !errors.Is(err, client.ErrUnreachable) || !strings.Contains(err.Error(), "after 3 tries") || !strings.Contains(err.Error(), addr) {
		t.Fatalf("report to a gone agentd: %v", err)
	}
}

func TestWrongToken(t *testing.T) {
	r := newRig(t, token, nil)
	var calls atomic.Int32
	counted := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, req *http.Request) {
		calls.Add(1)
		r.h.ServeHTTP(w, req)
	}))
	t.Cleanup(counted.Close)
	for _, c := range []*client.Client{newClient(t, counted.URL, client.WithToken("wrong-token-0123456789")), newClient(t, counted.URL)} {
		calls.Store(0)
		_, err := c.Decision(ctxFor(t, 5*time.Second), 1)
		if !errors.Is(err, client.ErrUnauthorized) || !strings.Contains(err.Error(), "401") || !strings.Contains(err.Error(), "--http-token-file") {
			t.Fatalf("want a 401 naming the token file: %v", err)
		}
		if err := c.Report(ctxFor(t, 5*time.Second), client.Observation{}); !errors.Is(err, client.ErrUnauthorized) {
			t.Fatalf("report: want a 401: %v", err)
		}
		if n := calls.Load(); n != 2 {
			t.Fatalf("%d requests: a 401 must not be retried", n)
		}
		// /healthz needs no token (it is for probes).
		if h, err := c.Health(ctxFor(t, 5*time.Second)); err != nil || !h.OK {
			t.Fatalf("health: %+v, %v", h, err)
		}
	}
	c := newClient(t, counted.URL, client.WithToken(token))
	r.start(epoch, 1, 0, 1)
	if d, err := c.Decision(ctxFor(t, 5*time.Second), 1); err != nil || !d.Act {
		t.Fatalf("with the right token: %+v, %v", d, err)
	}
}

func TestBadObservation(t *testing.T) {
	r := newRig(t, "", nil)
	var posts atomic.Int32
	counted := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, req *http.Request) {
		if req.Method == http.MethodPost {
			posts.Add(1)
		}
		r.h.ServeHTTP(w, req)
	}))
	t.Cleanup(counted.Close)
	c := newClient(t, counted.URL)
	for _, tc := range []struct {
		o    client.Observation
		want string
	}{
		{client.Observation{Position: 1000}, "position 1000 is not a cell of the 10 x 10 grid"},
		{client.Observation{Applied: 9}, "applied control 9 is not one of 0..4"},
		{client.Observation{Seen: []client.Sighting{{What: 0, Value: 3}, {What: 0, Value: 4}}}, "slick 0 reported twice"},
	} {
		posts.Store(0)
		err := c.Report(ctxFor(t, 5*time.Second), tc.o)
		if !errors.Is(err, client.ErrBadRequest) || !strings.Contains(err.Error(), tc.want) || !strings.Contains(err.Error(), "400") {
			t.Fatalf("%+v: want a 400 with %q: %v", tc.o, tc.want, err)
		}
		var se *client.StatusError
		if !errors.As(err, &se) || se.Code != 400 || !strings.Contains(se.Message, tc.want) {
			t.Fatalf("want a *StatusError with agentd's message: %#v", err)
		}
		if n := posts.Load(); n != 1 {
			t.Fatalf("%d posts: a 400 must not be retried", n)
		}
	}
	// A good one is accepted.
	if err := c.Report(ctxFor(t, 5*time.Second), client.Observation{Position: r.m.Cell(1, 1), Seen: []client.Sighting{{What: 0, Value: -1}}}); err != nil {
		t.Fatal(err)
	}
}

func TestCancelStopsWait(t *testing.T) {
	r := newRig(t, "", nil)
	c := newClient(t, r.srv.URL, client.WithWait(30*time.Second))
	for _, call := range []struct {
		name string
		f    func(context.Context) (client.Decision, error)
	}{
		{"decision", func(ctx context.Context) (client.Decision, error) { return c.Decision(ctx, 5) }},
		{"closed", func(ctx context.Context) (client.Decision, error) { return c.Closed(ctx, 5) }},
		{"next", func(ctx context.Context) (client.Decision, error) { return c.Next(ctx, 4) }},
	} {
		ctx, cancel := context.WithCancel(context.Background())
		time.AfterFunc(100*time.Millisecond, cancel)
		t0 := time.Now()
		d, err := call.f(ctx)
		if el := time.Since(t0); el > time.Second {
			t.Fatalf("%s: returned %s after the cancel", call.name, el-100*time.Millisecond)
		}
		if !errors.Is(err, context.Canceled) || d.Act {
			t.Fatalf("%s: want a hold and context.Canceled: %+v, %v", call.name, d, err)
		}
	}
	// With a deadline, agentd answers before it, so its last word is kept.
	t0 := time.Now()
	d, err := c.Decision(ctxFor(t, 400*time.Millisecond), 5)
	if el := time.Since(t0); !errors.Is(err, context.DeadlineExceeded) || d.Act || el > time.Second {
		t.Fatalf("deadline: %+v, %v after %s", d, err, el)
	}
	if !strings.Contains(d.Reason, "no round started here yet") || !strings.Contains(err.Error(), d.Reason) {
		t.Fatalf("want agentd's last reason in the hold and the error: %+v, %v", d, err)
	}
}

func TestHealth(t *testing.T) {
	r := newRig(t, "", func(c *node.Config) { c.Stale = time.Second })
	c := newClient(t, r.srv.URL)
	h, err := c.Health(ctxFor(t, 5*time.Second))
	if err != nil || !h.OK || !strings.Contains(h.Text, "waiting for the first round") {
		t.Fatalf("health before any round: %+v, %v", h, err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	watch := c.WatchHealth(ctx, 50*time.Millisecond)
	r.start(epoch, 1, 0, 1)
	sawOK, sawHold := false, false
	deadline := time.After(5 * time.Second)
	for !sawHold {
		select {
		case h, ok := <-watch:
			if !ok {
				t.Fatal("closed early")
			}
			if h.OK && strings.Contains(h.Text, "round 1") {
				sawOK = true
			}
			if !h.OK && strings.Contains(h.Text, "holding") {
				sawHold = true // no round start for --stale: 503 and why
			}
		case <-deadline:
			t.Fatalf("ok %v, hold %v", sawOK, sawHold)
		}
	}
	if !sawOK {
		t.Fatal("never saw the round in play")
	}
	cancel()
	for range watch {
	}
	// A watch on a down agentd sends the failure.
	srvURL := r.srv.URL
	r.srv.Close()
	c2 := newClient(t, srvURL)
	ctx2, cancel2 := context.WithCancel(context.Background())
	defer cancel2()
	h = <-c2.WatchHealth(ctx2, time.Second)
	if h.OK || !errors.Is(h.Err, client.ErrUnreachable) || h.Text == "" {
		t.Fatalf("watching a down agentd: %+v", h)
	}
}

func TestNew(t *testing.T) {
	for _, bad := range []string{"", "127.0.0.1:7400", "ftp://host:1", "http://", "http://u:p@host:1", "http://host:1/?x=1", "http://host:99999", "http://host:1/#f"} {
		if _, err := client.New(bad); err == nil {
			t.Errorf("%q accepted", bad)
		}
	}
	c, err := client.New("http://127.0.0.1:7400/gw/")
	if err != nil || c.URL() != "http://127.0.0.1:7400/gw" {
		t.Fatalf("%v %v", c, err)
	}
	for _, o := range []client.Option{client.WithToken("two words"), client.WithWait(2 * time.Minute), client.WithWait(0),
		client.WithRetry(client.RetryPolicy{}), client.WithHTTPClient(nil), client.WithHTTPClient(&http.Client{Timeout: time.Second}),
		client.WithTimeout(0), client.WithUserAgent("a\nb")} {
		if _, err := client.New(client.DefaultURL, o); err == nil {
			t.Errorf("option accepted")
		}
	}
}
