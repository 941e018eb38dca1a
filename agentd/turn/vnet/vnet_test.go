package vnet

import (
	"fmt"
	"slices"
	"strings"
	"testing"
	"time"

	"baton/agentd/turn"
	pb "baton/proto"

	"google.golang.org/protobuf/proto"
)

const (
	ms      = time.Millisecond
	hop     = 1 * ms
	compute = 2 * ms
)

// mix is a deterministic stand-in for the rollout whose result depends on
// what the robot knew, so a wrong Known shows up in the controls.
func mix(robot int, c turn.Compute) (int, time.Duration) {
	s := 7*robot + int(c.Round)
	for j, k := range c.Known {
		if k >= 0 {
			s += (j + 1) * (k + 3)
		}
	}
	return s % 5, compute
}

func fleetOf(robots int) *Net {
	return New(Config{Fleet: "harbor-1", Robots: robots, Delay: hop, Compute: mix})
}

var (
	order     = []int{2, 0, 3, 1}
	deadlines = []time.Duration{5 * ms, 10 * ms, 15 * ms, 20 * ms}
	controls  = []int{5, 5, 5, 5}
)

func ids(rs []int) []uint32 {
	out := make([]uint32, len(rs))
	for i, r := range rs {
		out[i] = uint32(r)
	}
	return out
}

// checkHeardAll: nobody guessed and each robot's Known is exactly its
// predecessors' published controls.
func checkHeardAll(t *testing.T, res RoundResult) {
	t.Helper()
	if !res.Complete {
		t.Fatalf("round %d incomplete", res.Round)
	}
	for k, r := range res.Order {
		tr := res.Turns[r]
		want := make([]int, len(controls))
		for i := range want {
			want[i] = -1
		}
		for _, p := range res.Order[:k] {
			want[p] = int(res.Turns[p].Decision.Control)
		}
		if !slices.Equal(tr.Known, want) || len(tr.Guess) != 0 {
			t.Errorf("robot %d: known %v guess %v, want known %v", r, tr.Known, tr.Guess, want)
		}
		if d := tr.Decision; !slices.Equal(d.Heard, ids(res.Order[:k])) || len(d.Guessed) != 0 {
			t.Errorf("robot %d: decision heard %v guessed %v", r, d.Heard, d.Guessed)
		}
		if tr.Decision.ComputeUs != uint64(compute/time.Microsecond) || tr.Decision.Sender != Sender(r) {
			t.Errorf("robot %d: decision %v", r, tr.Decision)
		}
	}
}

func TestNoFaults(t *testing.T) {
	for _, mode := range []turn.Mode{turn.Sequential, turn.Hybrid} {
		t.Run(mode.String(), func(t *testing.T) {
			n := fleetOf(4)
			res := n.RunRound(1, order, deadlines, mode, controls)
			checkHeardAll(t, res)
			// A sequential round is m computes plus m-1 hops.
			if want := 4*compute + 3*hop; res.Latency() != want {
				t.Errorf("latency %v want %v", res.Latency(), want)
			}
			for k, r := range order {
				if at := res.Turns[r].PublishedAt; at != time.Duration(k+1)*compute+time.Duration(k)*hop {
					t.Errorf("robot %d published at %v", r, at)
				}
			}
			for r := range 4 {
				if c := n.Machine(r).Counters(); c.Dropped() != 0 || c.Late != 0 {
					t.Errorf("robot %d counters %+v", r, c)
				}
			}
		})
	}
}

func TestParallel(t *testing.T) {
	n := fleetOf(4)
	res := n.RunRound(1, order, deadlines, turn.Parallel, controls)
	if !res.Complete || res.Latency() != compute {
		t.Fatalf("complete %v latency %v", res.Complete, res.Latency())
	}
	for k, r := range order {
		tr := res.Turns[r]
		if tr.AskedAt != 0 || tr.PublishedAt != compute {
			t.Errorf("robot %d asked %v published %v", r, tr.AskedAt, tr.PublishedAt)
		}
		if !slices.Equal(tr.Guess, order[:k]) || !slices.Equal(tr.Decision.Guessed, ids(order[:k])) || len(tr.Decision.Heard) != 0 {
			t.Errorf("robot %d guess %v decision %v", r, tr.Guess, tr.Decision)
		}
		if slices.ContainsFunc(tr.Known, func(c int) bool { return c >= 0 }) {
			t.Errorf("robot %d used heard controls %v", r, tr.Known)
		}
	}
	// Everything heard arrived after the Compute, but in parallel mode
	// nobody waited for it: nothing counts as late.
	for _, r := range order {
		if got := n.Machine(r).Counters().Late; got != 0 {
			t.Errorf("robot %d late %d want 0", r, got)
		}
	}
}

// checkSlow: order[1] is missing for its successors; they decide at
// their deadlines, guessing it.
func checkSlow(t *testing.T, res RoundResult) {
	t.Helper()
	slow := order[1]
	for k, r := range order[2:] {
		k += 2
		tr := res.Turns[r]
		if tr.Decision == nil {
			t.Fatalf("robot %d did not decide", r)
		}
		if !slices.Equal(tr.Guess, []int{slow}) || !slices.Equal(tr.Decision.Guessed, []uint32{uint32(slow)}) {
			t.Errorf("robot %d guess %v guessed %v", r, tr.Guess, tr.Decision.Guessed)
		}
		// The others were heard in time and used.
		var heard []int
		for _, p := range order[:k] {
			if p != slow {
				heard = append(heard, p)
				if tr.Known[p] != int(res.Turns[p].Decision.Control) {
					t.Errorf("robot %d known[%d] = %d", r, p, tr.Known[p])
				}
			}
		}
		if !slices.Equal(tr.Decision.Heard, ids(heard)) {
			t.Errorf("robot %d heard %v want %v", r, tr.Decision.Heard, heard)
		}
		if tr.AskedAt != deadlines[k-1] {
			t.Errorf("robot %d asked at %v, want its predecessor's deadline %v", r, tr.AskedAt, deadlines[k-1])
		}
	}
	if last := order[len(order)-1]; res.Turns[last].PublishedAt > deadlines[len(order)-1] {
		t.Errorf("last decision at %v, after the last deadline", res.Turns[last].PublishedAt)
	}
	if want := deadlines[2] + compute; res.Turns[order[3]].PublishedAt != want {
		t.Errorf("last decision at %v want %v", res.Turns[order[3]].PublishedAt, want)
	}
}

func TestHybridSlowLink(t *testing.T) {
	n := fleetOf(4)
	slow := order[1]
	for to := range 4 {
		if to != slow {
			n.SetDelay(slow, to, 50*ms) // longer than any deadline
		}
	}
	res := n.RunRound(1, order, deadlines, turn.Hybrid, controls)
	checkSlow(t, res)
	if !res.Complete {
		t.Fatal("the slow robot still decides")
	}
	// Its decision arrived later: recorded as late, not dropped.
	for _, r := range order[2:] {
		if c := n.Machine(r).Counters(); c.Late != 1 || c.Dropped() != 0 {
			t.Errorf("robot %d counters %+v", r, c)
		}
	}
}

func TestHybridPaused(t *testing.T) {
	n := fleetOf(4)
	n.SetPaused(order[1], true)
	res := n.RunRound(1, order, deadlines, turn.Hybrid, controls)
	checkSlow(t, res)
	if res.Complete || res.Turns[order[1]].Decision != nil {
		t.Fatal("a paused robot published")
	}
	// Back next round, with nothing stuck from the last one.
	n.SetPaused(order[1], false)
	checkHeardAll(t, n.RunRound(2, order, deadlines, turn.Hybrid, controls))
}

func TestSequentialPausedWaits(t *testing.T) {
	n := fleetOf(4)
	n.SetPaused(order[1], true)
	res := n.RunRound(1, order, deadlines, turn.Sequential, controls)
	if res.Complete {
		t.Fatal("complete with a paused robot")
	}
	if res.Turns[order[0]].Decision == nil {
		t.Fatal("first robot did not decide")
	}
	for _, r := range order[1:] {
		if tr := res.Turns[r]; tr.Asked || tr.Decision != nil {
			t.Errorf("robot %d did not wait: %+v", r, tr)
		}
	}
	if n.Pending() != 0 {
		t.Fatalf("%d events left", n.Pending())
	}
	// The next round abandons round 1; the paused robot is left out.
	start := n.Now()
	next := []int{2, 3, 1}
	res = n.RunRound(2, next, deadlines[:3], turn.Sequential, controls)
	if !res.Complete || res.Start != start {
		t.Fatalf("round 2: complete %v start %v", res.Complete, res.Start)
	}
	for r := range 4 {
		if r != order[1] && n.Machine(r).Round() != 2 {
			t.Errorf("robot %d at round %d", r, n.Machine(r).Round())
		}
	}
	if got := n.Result(1); got.Complete || got.Turns[order[2]].Decision != nil {
		t.Error("round 1 finished after it was abandoned")
	}
}

func TestEarlyDecisions(t *testing.T) {
	n := fleetOf(4)
	late := order[2]
	n.SetStartDelay(late, 50*ms) // hears both predecessors before its round start
	long := []time.Duration{100 * ms, 200 * ms, 300 * ms, 400 * ms}
	res := n.RunRound(1, order, long, turn.Hybrid, controls)
	checkHeardAll(t, res)
	if got := res.Turns[late].AskedAt; got != 50*ms {
		t.Errorf("robot %d asked at %v, want at its round start", late, got)
	}
	if c := n.Machine(late).Counters(); c.Dropped() != 0 {
		t.Errorf("counters %+v", c)
	}
}

func TestLossAndStale(t *testing.T) {
	n := fleetOf(4)
	// Lose everything robot order[0] sends to order[2]; order[2] guesses it.
	n.SetLoss(func(from, to int, round uint64) bool { return from == order[0] && to == order[2] && round == 1 })
	res := n.RunRound(1, order, deadlines, turn.Hybrid, controls)
	if tr := res.Turns[order[2]]; !slices.Equal(tr.Guess, []int{order[0]}) || tr.AskedAt != deadlines[1] {
		t.Errorf("lossy link: %+v", tr)
	}
	if tr := res.Turns[order[3]]; len(tr.Guess) != 0 {
		t.Errorf("robot %d guessed %v", order[3], tr.Guess)
	}

	// Replay round 1's first decision during round 2, and forge one.
	n.SetLoss(nil)
	n.StartRound(2, order, deadlines, turn.Hybrid, controls)
	old, _ := proto.Marshal(res.Turns[order[0]].Decision)
	n.Inject(n.Now(), order[3], old)
	n.Inject(n.Now(), order[3], []byte("not a decision"))
	n.Run()
	var reasons []string
	for _, d := range n.Drops(order[3]) {
		reasons = append(reasons, string(d.Reason))
	}
	if want := []string{"stale", "malformed"}; !slices.Equal(reasons, want) {
		t.Errorf("drops %v want %v", reasons, want)
	}
	if !n.Result(2).Complete {
		t.Error("round 2 incomplete")
	}
}

// summary flattens a run for comparison.
func summary(rs ...RoundResult) string {
	var b strings.Builder
	for _, r := range rs {
		fmt.Fprintf(&b, "round %d %v..%v %v\n", r.Round, r.Start, r.End, r.Complete)
		for i, t := range r.Turns {
			fmt.Fprintf(&b, " %d %v %v %v %v %v %v\n", i, t.Asked, t.AskedAt, t.Known, t.Guess, t.PublishedAt, decisionText(t.Decision))
		}
	}
	return b.String()
}

func decisionText(d *pb.Decision) string {
	if d == nil {
		return "-"
	}
	return fmt.Sprintf("%d %v %v", d.Control, d.Heard, d.Guessed)
}

func TestDeterministic(t *testing.T) {
	run := func() string {
		n := fleetOf(4)
		n.SetDelay(0, 3, 7*ms)
		n.SetLoss(func(from, to int, round uint64) bool {
			return (uint64(from*31+to*17)+round*13)%5 == 0 // a fixed pseudo-random pattern
		})
		var rs []RoundResult
		for round := uint64(1); round <= 6; round++ {
			mode := []turn.Mode{turn.Hybrid, turn.Parallel, turn.Sequential}[round%3]
			rs = append(rs, n.RunRound(round, order, deadlines, mode, controls))
		}
		return summary(rs...)
	}
	a, b := run(), run()
	if a != b {
		t.Fatalf("runs differ:\n%s\n%s", a, b)
	}
}
