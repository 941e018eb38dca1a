package hub

import (
	"bytes"
	"context"
	"encoding/json"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus/testutil"

	"baton/agentd/decide"
	"baton/agentd/turn"
	"baton/coordinator/clock"
	"baton/deploy/shell"
	pb "baton/proto"
	"baton/proto/wire"
	"baton/sim/harbor"
)

// syncBuf is a decision log the test can read while the hub writes.
type syncBuf struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuf) Write(p []byte) (int, error) { s.mu.Lock(); defer s.mu.Unlock(); return s.b.Write(p) }
func (s *syncBuf) String() string              { s.mu.Lock(); defer s.mu.Unlock(); return s.b.String() }

// The hub without a server: robots that report, one that decides; junk is
// counted; stopping mid-round files the round as interrupted, with its
// epoch.
func TestHubInterruptedRound(t *testing.T) {
	m, _ := harbor.Default(3)
	subj, _ := pb.NewSubjects("baton", "yard")
	bus := &shell.MemBus{}
	cc := clock.DefaultConfig()
	cc.Fleet, cc.Model, cc.Decide, cc.Epoch = "yard", m, decide.Config{Samples: 2, Horizon: 2}, 42
	cc.TurnBudget = time.Hour // nobody's deadline passes in this test
	log := &syncBuf{}
	met := NewMetrics(nil)
	h := New(Config{Clock: cc, Subjects: subj, DecisionLog: log, Metrics: met}, bus)
	starts := make(chan *nats.Msg, 8)
	if _, err := bus.ChanSubscribe(subj.Round, starts); err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error)
	go func() { done <- h.Run(ctx) }()
	// Reports, repeated until the hub has subscribed.
	var start turn.Start
	for len(starts) == 0 {
		for r := range 3 {
			data, _ := wire.EncodeReport(turn.Report{Fleet: "yard", Robot: uint32(r), Position: int32(r)})
			bus.Publish(subj.ObsOf(r), data)
		}
		time.Sleep(10 * time.Millisecond)
	}
	start, err := wire.Start((<-starts).Data)
	if err != nil || start.Round != 1 || start.Epoch != 42 {
		t.Fatalf("%+v %v", start, err)
	}
	// The junk goes second: once it is counted, the decision before it on
	// the same channel has been handled.
	data, _ := wire.EncodeDecision(turn.Decision{Fleet: "yard", Epoch: 42, Round: 1, Robot: 0, Control: 2})
	bus.Publish(subj.DecisionOf(0), data)
	bus.Publish(subj.DecisionOf(0), []byte{0xff, 0xff})
	deadline := time.Now().Add(5 * time.Second)
	for testutil.ToFloat64(met.Dropped.WithLabelValues("malformed")) != 1 {
		if time.Now().After(deadline) {
			t.Fatal("junk not counted")
		}
		time.Sleep(5 * time.Millisecond)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	var line Line
	if err := json.Unmarshal([]byte(strings.TrimSpace(log.String())), &line); err != nil {
		t.Fatalf("%v: %q", err, log.String())
	}
	if !line.Interrupted || line.Epoch != 42 || line.Round != 1 || line.Controls[0] != 2 || line.StartedAt.IsZero() {
		t.Fatalf("%+v", line)
	}
}
