package herding_test

import (
	"context"
	"slices"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"google.golang.org/protobuf/proto"

	"baton/agentd/decide"
	"baton/agentd/node"
	"baton/agentd/turn"
	"baton/coordinator/clock"
	"baton/coordinator/hub"
	"baton/deploy/shell"
	pb "baton/proto"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/world"
)

// runFleet plays rounds of a 4-boat harbor fleet in parallel mode with the
// coordinator naming guess, over an embedded NATS server: real nodes, real
// hub, a seeded world fed by the round closes. It returns the hub's records.
func runFleet(t *testing.T, guess string, rounds int, params *pb.DecideParams, with ...func(*clock.Config)) []clock.Record {
	t.Helper()
	ns, url, err := shell.EmbeddedNATS("127.0.0.1", 0)
	if err != nil {
		t.Fatal(err)
	}
	defer ns.Shutdown()
	connect := func() *nats.Conn {
		nc, err := nats.Connect(url)
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(nc.Close)
		return nc
	}
	m, _ := harbor.Default(4)
	subj, _ := pb.NewSubjects("baton", "herd")
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	var nodes []*node.Node
	for r := range m.Robots() {
		// Every node's fallback is base: the round start must pick the source.
		cfg := node.DefaultConfig()
		cfg.Fleet, cfg.Subjects, cfg.Robot, cfg.Sender, cfg.Model = "herd", subj, r, "boat", m
		n := node.New(cfg, shell.NATSBus{Conn: connect()})
		nodes = append(nodes, n)
		go n.Run(ctx)
	}
	// The world: every round close is carried out and reported back.
	w := world.New(m, 5)
	report := func(round uint64) {
		for r, n := range nodes {
			pos, seen := w.Report(r)
			if err := n.Observe(node.Report{Round: round, Position: pos, Seen: seen}); err != nil {
				t.Error(err)
			}
		}
	}
	closes := make(chan *pb.RoundClose, rounds+1)
	sub, err := connect().Subscribe(subj.Close, func(msg *nats.Msg) {
		var rc pb.RoundClose
		if proto.Unmarshal(msg.Data, &rc) == nil {
			closes <- &rc
		}
	})
	if err != nil {
		t.Fatal(err)
	}
	defer sub.Unsubscribe()
	worldDone := make(chan struct{})
	go func() {
		defer close(worldDone)
		// Round 0's reports, repeated until the hub has subscribed and
		// started round 1 (it waits for them).
		for len(closes) == 0 && ctx.Err() == nil {
			report(0)
			time.Sleep(100 * time.Millisecond)
		}
		for rc := range closes {
			u := make([]int, len(rc.GetControls()))
			for i, c := range rc.GetControls() {
				u[i] = int(c)
			}
			w.Apply(u)
			report(rc.GetRound())
			if int(rc.GetRound()) == rounds {
				return
			}
		}
	}()
	var recs []clock.Record
	cc := clock.DefaultConfig()
	cc.Fleet, cc.Model, cc.Mode, cc.Guess, cc.TurnBudget, cc.Rounds, cc.ReportWait = "herd", m, turn.Parallel, guess, time.Second, rounds, time.Second
	cc.Decide, cc.Seed = decide.Config{Samples: int(params.Samples), Horizon: int(params.Horizon)}, params.FleetSeed
	for _, f := range with {
		f(&cc)
	}
	if err := cc.Validate(); err != nil {
		t.Fatal(err)
	}
	h := hub.New(hub.Config{Clock: cc, Subjects: subj, OnRound: func(r clock.Record) { recs = append(recs, r) }}, shell.NATSBus{Conn: connect()})
	if err := h.Run(ctx); err != nil {
		t.Fatal(err)
	}
	select { // the last reports are out before the connections close
	case <-worldDone:
	case <-time.After(10 * time.Second):
		t.Fatal("the world never saw the last round close")
	}
	return recs
}

// The guess source travels in the round start, and each one behaves over
// the wire as it does in process: in parallel mode (no turn hears any
// predecessor) recompute makes the fleet decide exactly as sequential
// one-at-a-time rollout; base and last give the in-process parallel
// decisions with base guesses and with the previous round's controls.
func TestFleetGuessSourcesOverNATS(t *testing.T) {
	params := &pb.DecideParams{Samples: 4, Horizon: 5, FleetSeed: 9}
	m, _ := harbor.Default(4)
	d := decide.New(m, decide.Config{Samples: 4, Horizon: 5})
	for _, guess := range []string{"recompute", "base", "last"} {
		t.Run(guess, func(t *testing.T) {
			recs := runFleet(t, guess, 6, params)
			if len(recs) != 6 {
				t.Fatalf("%d rounds recorded, want 6", len(recs))
			}
			var prev []int
			for _, rec := range recs {
				if len(rec.Held) > 0 {
					t.Fatalf("round %d: robots %v held", rec.Round, rec.Held)
				}
				x := m.NewState()
				if err := m.Unflatten(x, rec.Snapshot.Ints, rec.Snapshot.Reals); err != nil {
					t.Fatal(err)
				}
				want := make([]int, m.Robots())
				if guess == "recompute" {
					d.OneAtATime(x, rec.Order, params.FleetSeed, int(rec.Round), want)
				} else {
					for k, r := range rec.Order {
						known := []int{-1, -1, -1, -1}
						for _, p := range rec.Order[:k] {
							known[p] = guessOf(m, x, guess, prev, p)
						}
						want[r], _ = d.Turn(x, r, known, decide.TurnSeed(params.FleetSeed, int(rec.Round), r))
					}
				}
				if !slices.Equal(rec.Controls, want) {
					t.Errorf("round %d: the fleet decided %v, in process %v", rec.Round, rec.Controls, want)
				}
				prev = rec.Controls
			}
		})
	}
}

func guessOf(m model.Model, x model.State, guess string, prev []int, p int) int {
	if guess == "last" && prev != nil {
		return prev[p] // harbor: every control stays valid
	}
	return m.Base(x, p)
}

// The link monitor at work: with a round period shorter than a sequential
// round's hops could ever fit, --auto-parallel switches hybrid rounds to
// parallel as soon as robots have reported hop times; without it the
// fleet stays hybrid.
func TestAutoParallel(t *testing.T) {
	params := &pb.DecideParams{Samples: 2, Horizon: 3, FleetSeed: 1}
	modes := func(auto bool) []string {
		recs := runFleet(t, "base", 4, params, func(c *clock.Config) {
			c.Mode, c.Period, c.AutoParallel = turn.Hybrid, time.Microsecond, auto
		})
		var out []string
		for _, r := range recs {
			out = append(out, r.Mode)
		}
		return out
	}
	if got := modes(false); slices.Contains(got, "parallel") {
		t.Fatalf("without --auto-parallel: %v", got)
	}
	got := modes(true)
	if got[0] != "hybrid" || got[len(got)-1] != "parallel" {
		t.Fatalf("with --auto-parallel: %v, want hybrid first (no hop samples yet), parallel later", got)
	}
}
