package hub

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
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

// journalRec is a journal that remembers appends, checks that no close of
// the round went out before its write-ahead record, and fails the first
// fails appends.
type journalRec struct {
	mu     sync.Mutex
	closes chan *nats.Msg
	got    []string
	early  []uint64 // rounds whose close was out before their record
	fails  int
}

func (j *journalRec) Append(_ context.Context, kind string, epoch, round uint64, line []byte) error {
	j.mu.Lock()
	defer j.mu.Unlock()
	if j.fails > 0 {
		j.fails--
		return context.DeadlineExceeded
	}
	if kind == shell.JournalClosed {
		for range len(j.closes) {
			c := <-j.closes
			if cl, err := wire.Close(c.Data); err == nil && cl.Round == round {
				j.early = append(j.early, round)
			}
		}
	}
	var l Line
	if err := json.Unmarshal(line, &l); err != nil || l.Round != round || l.Epoch != epoch {
		j.got = append(j.got, "bad record")
	}
	j.got = append(j.got, kind)
	return nil
}

func (j *journalRec) appended() []string {
	j.mu.Lock()
	defer j.mu.Unlock()
	return append([]string(nil), j.got...)
}

// A round's write-ahead record is in the durable log before its close goes
// out, and its filed record after the reports; a failed append is retried,
// and one that never succeeds is counted while the fleet goes on.
func TestHubJournal(t *testing.T) {
	for _, fails := range []int{1, 100} {
		m, _ := harbor.Default(2)
		subj, _ := pb.NewSubjects("baton", "yard")
		bus := &shell.MemBus{}
		cc := clock.DefaultConfig()
		cc.Fleet, cc.Model, cc.Decide, cc.Epoch, cc.Rounds = "yard", m, decide.Config{Samples: 2, Horizon: 2}, 42, 1
		cc.TurnBudget = time.Hour
		j := &journalRec{closes: make(chan *nats.Msg, 64), fails: fails}
		met := NewMetrics(nil)
		h := New(Config{Clock: cc, Subjects: subj, Journal: j, Metrics: met, JournalGiveUp: 600 * time.Millisecond}, bus)
		starts := make(chan *nats.Msg, 8)
		bus.ChanSubscribe(subj.Round, starts)
		bus.ChanSubscribe(subj.Close, j.closes)
		done := make(chan error)
		go func() { done <- h.Run(context.Background()) }()
		report := func(round uint64, epoch uint64) {
			for r := range 2 {
				data, _ := wire.EncodeReport(turn.Report{Fleet: "yard", Epoch: epoch, Round: round, Robot: uint32(r), Position: int32(r)})
				bus.Publish(subj.ObsOf(r), data)
			}
		}
		for len(starts) == 0 {
			report(0, 0)
			time.Sleep(10 * time.Millisecond)
		}
		for r := range 2 {
			data, _ := wire.EncodeDecision(turn.Decision{Fleet: "yard", Epoch: 42, Round: 1, Robot: uint32(r), Control: 0})
			bus.Publish(subj.DecisionOf(r), data)
		}
		deadline := time.Now().Add(10 * time.Second)
		for {
			report(1, 42)
			select {
			case err := <-done:
				if err != nil {
					t.Fatal(err)
				}
			case <-time.After(20 * time.Millisecond):
				if time.Now().After(deadline) {
					t.Fatalf("fails %d: the round never finished; journal %v", fails, j.appended())
				}
				continue
			}
			break
		}
		got := j.appended()
		switch fails {
		case 1:
			if strings.Join(got, ",") != "closed,filed" || len(j.early) != 0 {
				t.Fatalf("journal %v, closes out before their record: %v", got, j.early)
			}
			if n := testutil.ToFloat64(met.JournalFails); n != 0 {
				t.Fatalf("a retried append counted as lost: %g", n)
			}
		default:
			if len(got) != 0 || testutil.ToFloat64(met.JournalFails) != 2 {
				t.Fatalf("journal %v, %g failures counted, want both records counted as lost", got, testutil.ToFloat64(met.JournalFails))
			}
		}
	}
}

// slowJournal stalls on round 1's filed record, as a stream does while its
// cluster elects a new leader.
type slowJournal struct {
	stall time.Duration
	mu    sync.Mutex
	kinds []string
}

func (j *slowJournal) Append(_ context.Context, kind string, _, round uint64, _ []byte) error {
	if kind == shell.JournalFiled && round == 1 {
		time.Sleep(j.stall)
	}
	j.mu.Lock()
	j.kinds = append(j.kinds, fmt.Sprint(kind, round))
	j.mu.Unlock()
	return nil
}

// A stalled durable log does not stall the round loop: round 2's decisions,
// sent while round 1's record waits, are taken within their deadlines
// (nobody held), and round 2's close goes out once its own record is in.
func TestHubSlowJournalHoldsNobody(t *testing.T) {
	m, _ := harbor.Default(2)
	subj, _ := pb.NewSubjects("baton", "yard")
	bus := &shell.MemBus{}
	cc := clock.DefaultConfig()
	cc.Fleet, cc.Model, cc.Decide, cc.Epoch, cc.Rounds = "yard", m, decide.Config{Samples: 2, Horizon: 2}, 42, 2
	cc.TurnBudget = 100 * time.Millisecond
	j := &slowJournal{stall: 1500 * time.Millisecond}
	log := &syncBuf{}
	h := New(Config{Clock: cc, Subjects: subj, Journal: j, DecisionLog: log}, bus)
	starts, closes := make(chan *nats.Msg, 64), make(chan *nats.Msg, 64)
	bus.ChanSubscribe(subj.Round, starts)
	bus.ChanSubscribe(subj.Close, closes)
	done := make(chan error)
	go func() { done <- h.Run(context.Background()) }()
	report := func(round, epoch uint64) {
		for r := range 2 {
			data, _ := wire.EncodeReport(turn.Report{Fleet: "yard", Epoch: epoch, Round: round, Robot: uint32(r), Position: int32(r)})
			bus.Publish(subj.ObsOf(r), data)
		}
	}
	decideAll := func(round uint64) {
		for r := range 2 {
			data, _ := wire.EncodeDecision(turn.Decision{Fleet: "yard", Epoch: 42, Round: round, Robot: uint32(r), Control: 0})
			bus.Publish(subj.DecisionOf(r), data)
		}
	}
	deadline := time.Now().Add(10 * time.Second)
	var closedAt2 time.Time
	for round := uint64(0); ; {
		select {
		case err := <-done:
			if err != nil {
				t.Fatal(err)
			}
			if closedAt2.IsZero() {
				t.Fatal("round 2 never closed")
			}
			var lines []Line
			for _, s := range strings.Split(strings.TrimSpace(log.String()), "\n") {
				var l Line
				if err := json.Unmarshal([]byte(s), &l); err != nil {
					t.Fatal(err)
				}
				lines = append(lines, l)
			}
			if len(lines) != 2 || len(lines[1].Held) != 0 || len(lines[0].Held) != 0 {
				t.Fatalf("rounds %+v: want 2 rounds, nobody held", lines)
			}
			j.mu.Lock()
			defer j.mu.Unlock()
			if strings.Join(j.kinds, ",") != "closed1,filed1,closed2,filed2" {
				t.Fatalf("journal order %v", j.kinds)
			}
			return
		case m := <-starts:
			s, _ := wire.Start(m.Data)
			if s.Round > round {
				round = s.Round
				decideAll(round)
			}
		case m := <-closes:
			c, _ := wire.Close(m.Data)
			if c.Round == 2 && closedAt2.IsZero() {
				closedAt2 = time.Now()
			}
			report(c.Round, 42)
		case <-time.After(20 * time.Millisecond):
			if round == 0 {
				report(0, 0)
			}
			if time.Now().After(deadline) {
				t.Fatalf("stuck at round %d", round)
			}
		}
	}
}
