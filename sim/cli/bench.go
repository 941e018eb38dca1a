package cli

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"sort"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/nats-io/nats.go"
	"google.golang.org/protobuf/proto"

	"baton/agentd/node"
	"baton/agentd/turn"
	"baton/deploy/shell"
	pb "baton/proto"
	"baton/sim/harbor"
	"baton/sim/model"
)

// sleeper is the stubbed compute: a fixed wall-clock cost per turn. Sleep,
// not spin: on a real fleet every robot has its own CPU, which spinning
// sixteen daemons on two cores would not model.
type sleeper struct {
	d     time.Duration
	mu    sync.Mutex
	total time.Duration
	n     int
}

func (s *sleeper) Turn(model.State, int, []int, uint64, turn.Params) int {
	t0 := time.Now()
	time.Sleep(s.d)
	took := time.Since(t0)
	s.mu.Lock()
	s.total += took
	s.n++
	s.mu.Unlock()
	return 0
}

func (s *sleeper) mean() time.Duration {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.n == 0 {
		return 0
	}
	return s.total / time.Duration(s.n)
}

type benchRow struct {
	Robots        int     `json:"robots"`
	Mode          string  `json:"mode"`
	RoundUs       float64 `json:"round_us"`
	FromPublishUs float64 `json:"from_publish_us"`
	ComputeUs     float64 `json:"compute_us"`
	OverheadRatio float64 `json:"overhead_ratio"`
}

type benchReport struct {
	// HopUs is measured the way a turn's hop happens: after the receiver
	// has sat idle for one compute. HopBackToBackUs is the same with no gap.
	HopUs           float64    `json:"hop_us"`
	HopBackToBackUs float64    `json:"hop_back_to_back_us"`
	Rows            []benchRow `json:"rows"`
}

func cmdBench(args []string) error {
	const benchUsage = "usage: sim bench rounds|security|search [flags]   (run 'sim bench rounds -h' for the flags)"
	if len(args) > 0 && args[0] == "security" {
		return cmdBenchSecurity(args[1:])
	}
	if len(args) > 0 && args[0] == "search" {
		return cmdBenchSearch(args[1:])
	}
	if len(args) == 0 || args[0] != "rounds" {
		if len(args) > 0 && (args[0] == "-h" || args[0] == "-help" || args[0] == "--help") {
			fmt.Println(benchUsage)
			return nil
		}
		return fmt.Errorf("%s", benchUsage)
	}
	fs := newFlags("bench rounds", "Measures, in one run on one embedded NATS server, the publish-to-receive hop and\nthe latency of sequential and parallel rounds of real robot daemons (in-process,\none NATS connection each) with the rollout compute stubbed to a fixed cost.\n\nround_us runs from robot 0 accepting the round start to the coordinator\nreceiving the last decision: the chain of m turns, m hops. from_publish_us\nadds the round start's own hop. overhead_ratio = (round_us - m*compute) / (m*hop)\nfor sequential rounds, (round_us - compute) / hop for parallel ones.")
	robotsFlag := fs.String("robots", "2,4,8,16", "fleet sizes to measure")
	compute := fs.Duration("compute", 2*time.Millisecond, "stubbed compute per turn")
	rounds := fs.Int("rounds", 40, "rounds per fleet size and mode (the median is reported)")
	hops := fs.Int("hops", 500, "publish-to-receive samples for the hop (the median is reported)")
	asJSON := fs.Bool("json", false, "print one JSON object")
	if err := parse(fs, args[1:]); err != nil {
		return err
	}
	var sizes []int
	for _, f := range strings.Split(*robotsFlag, ",") {
		v, err := strconv.Atoi(strings.TrimSpace(f))
		if err != nil || v < 1 || v > 64 {
			return fmt.Errorf("--robots: %q is not a fleet size from 1 to 64", f)
		}
		sizes = append(sizes, v)
	}
	if *rounds < 1 || *hops < 1 || *compute < 0 {
		return fmt.Errorf("--rounds and --hops must be at least 1, --compute non-negative")
	}
	ns, url, err := shell.EmbeddedNATS("127.0.0.1", 0)
	if err != nil {
		return err
	}
	defer ns.Shutdown()
	hop, err := measureHop(url, *hops, *compute)
	if err != nil {
		return err
	}
	hot, err := measureHop(url, *hops, 0)
	if err != nil {
		return err
	}
	rep := benchReport{HopUs: us(hop), HopBackToBackUs: us(hot)}
	for _, m := range sizes {
		for _, mode := range []pb.Mode{pb.Mode_MODE_SEQUENTIAL, pb.Mode_MODE_PARALLEL} {
			row, err := benchRounds(url, m, mode, *compute, *rounds, hop)
			if err != nil {
				return err
			}
			rep.Rows = append(rep.Rows, row)
		}
	}
	if *asJSON {
		enc := json.NewEncoder(os.Stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(rep)
	}
	fmt.Printf("publish-to-receive hop on the embedded NATS server: %.1f us after %s idle, as in a turn (%.1f us back to back); medians of %d\n\n",
		rep.HopUs, *compute, rep.HopBackToBackUs, *hops)
	fmt.Printf("%6s  %-10s  %10s  %15s  %10s  %14s\n", "robots", "mode", "round_us", "from_publish_us", "compute_us", "overhead_ratio")
	for _, r := range rep.Rows {
		fmt.Printf("%6d  %-10s  %10.0f  %15.0f  %10.0f  %14.2f\n", r.Robots, r.Mode, r.RoundUs, r.FromPublishUs, r.ComputeUs, r.OverheadRatio)
	}
	return nil
}

func us(d time.Duration) float64 { return float64(d) / float64(time.Microsecond) }

func median(ds []time.Duration) time.Duration {
	sort.Slice(ds, func(i, j int) bool { return ds[i] < ds[j] })
	return ds[len(ds)/2]
}

// measureHop times one message from one connection to another through the
// server, one at a time, on this process's clock, with gap between
// messages: an idle machine wakes slower than a busy one, and in a
// sequential round every hop follows a compute during which the receiver
// sat idle.
func measureHop(url string, n int, gap time.Duration) (time.Duration, error) {
	pubc, err := nats.Connect(url)
	if err != nil {
		return 0, err
	}
	defer pubc.Close()
	subc, err := nats.Connect(url)
	if err != nil {
		return 0, err
	}
	defer subc.Close()
	// Received the way the daemon receives: a channel subscription.
	got := make(chan time.Time, 1)
	msgs := make(chan *nats.Msg, 16)
	sub, err := subc.ChanSubscribe("bench.hop", msgs)
	if err != nil {
		return 0, err
	}
	defer sub.Unsubscribe()
	go func() {
		for range msgs {
			got <- time.Now()
		}
	}()
	subc.Flush()
	payload := make([]byte, 64) // about a decision's size
	var ds []time.Duration
	for range n {
		t0 := time.Now()
		if err := pubc.Publish("bench.hop", payload); err != nil {
			return 0, err
		}
		select {
		case t1 := <-got:
			ds = append(ds, t1.Sub(t0))
		case <-time.After(5 * time.Second):
			return 0, fmt.Errorf("hop message lost")
		}
		if gap > 0 {
			time.Sleep(gap)
		}
	}
	return median(ds), nil
}

func benchRounds(url string, m int, mode pb.Mode, compute time.Duration, rounds int, hop time.Duration) (benchRow, error) {
	hm, err := harbor.Default(m)
	if err != nil {
		return benchRow{}, err
	}
	fleet := fmt.Sprintf("bench%d%s", m, strings.ToLower(strings.TrimPrefix(mode.String(), "MODE_")))
	subj, _ := pb.NewSubjects("baton", fleet)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	stub := &sleeper{d: compute}
	var mu sync.Mutex
	starts := map[uint64]time.Time{} // robot 0's acceptance of each round
	var conns []*nats.Conn
	defer func() {
		for _, c := range conns {
			c.Close()
		}
	}()
	for r := range m {
		nc, err := nats.Connect(url)
		if err != nil {
			return benchRow{}, err
		}
		conns = append(conns, nc)
		cfg := node.DefaultConfig()
		cfg.Fleet, cfg.Subjects, cfg.Robot, cfg.Sender, cfg.Model, cfg.Compute = fleet, subj, r, fmt.Sprintf("robot-%d", r), hm, stub
		if r == 0 {
			cfg.OnRound = func(round uint64, at time.Time) { mu.Lock(); starts[round] = at; mu.Unlock() }
		}
		n := node.New(cfg, shell.NATSBus{Conn: nc})
		go n.Run(ctx)
	}
	cc, err := nats.Connect(url)
	if err != nil {
		return benchRow{}, err
	}
	defer cc.Close()
	type arrival struct {
		round uint64
		at    time.Time
	}
	arrivals := make(chan arrival, 1024)
	sub, err := cc.Subscribe(subj.Decision, func(msg *nats.Msg) {
		at := time.Now()
		var d pb.Decision
		if proto.Unmarshal(msg.Data, &d) == nil {
			arrivals <- arrival{d.GetRound(), at}
		}
	})
	if err != nil {
		return benchRow{}, err
	}
	defer sub.Unsubscribe()
	cc.Flush()
	time.Sleep(100 * time.Millisecond) // let every daemon's subscriptions settle
	x := hm.NewState()
	hm.Start(x, model.NewRNG(1).Rand)
	ints, reals := hm.Flatten(x, nil, nil)
	order := make([]uint32, m)
	deadlines := make([]uint64, m)
	for k := range m {
		order[k] = uint32(k)
		deadlines[k] = uint64(k+1) * 10e6 // far: nothing should wait for a deadline
	}
	var chain, total []time.Duration
	for round := uint64(1); round <= uint64(rounds)+2; round++ {
		data, _ := proto.Marshal(&pb.RoundStart{Fleet: fleet, Round: round, Sender: "bench", Order: order, DeadlinesUs: deadlines,
			Mode: mode, State: &pb.Snapshot{Scenario: "harbor", Ints: ints, Reals: reals}, Params: &pb.DecideParams{Samples: 1, Horizon: 1}})
		t0 := time.Now()
		if err := cc.Publish(subj.Round, data); err != nil {
			return benchRow{}, err
		}
		var last time.Time
		for seen := 0; seen < m; {
			select {
			case a := <-arrivals:
				if a.round == round {
					seen++
					last = a.at
				}
			case <-time.After(10 * time.Second):
				return benchRow{}, fmt.Errorf("%d robots, %s: round %d incomplete after 10s", m, mode, round)
			}
		}
		mu.Lock()
		s := starts[round]
		mu.Unlock()
		if round > 2 { // the first rounds warm connections and caches
			chain = append(chain, last.Sub(s))
			total = append(total, last.Sub(t0))
		}
	}
	row := benchRow{Robots: m, Mode: strings.ToLower(strings.TrimPrefix(mode.String(), "MODE_")),
		RoundUs: us(median(chain)), FromPublishUs: us(median(total)), ComputeUs: us(stub.mean())}
	if mode == pb.Mode_MODE_SEQUENTIAL {
		row.OverheadRatio = (row.RoundUs - float64(m)*row.ComputeUs) / (float64(m) * us(hop))
	} else {
		row.OverheadRatio = (row.RoundUs - row.ComputeUs) / us(hop)
	}
	return row, nil
}
