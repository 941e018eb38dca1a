package cli

import (
	"encoding/json"
	"fmt"
	"os"
	"time"

	"baton/agentd/decide"
	"baton/sim/fleetsum"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// searchArm is one configuration of the rollout search that `sim bench
// search` times: op runs one unit of work (a turn or a whole decision) and
// returns the robot-steps it simulated.
type searchArm struct {
	Name       string     `json:"name"`
	Unit       string     `json:"unit"`
	Robots     int        `json:"robots"`
	Workers    int        `json:"workers"`
	UsPerOp    float64    `json:"us_per_op"`
	NsPerStep  float64    `json:"ns_per_robot_step"`
	VsFull     float64    `json:"time_vs_full,omitempty"`
	ref        *searchArm // the full search this one is compared with
	op         func() int64
	opTimes    []float64
	stepTimes  []float64
	warmedOnce bool
}

// noSpeedups hides a model's fleet-wide base (model.JointBaser) and its
// control aliases (model.Aliaser): the search as it was without them.
type noSpeedups struct{ model.Model }

// noAliases hides only the aliases.
type noAliases struct{ model.Model }

func (n noAliases) BaseAll(s model.State, u []int) { model.BaseJoint(n.Model, s, u) }

func cmdBenchSearch(args []string) error {
	fs := newFlags("bench search", `Times the rollout search's hot path with each speed-up on and off, every
configuration in turn within each block, so all see the same machine load;
the medians over blocks are printed, with each configuration's time as a
ratio of the first row of its kind (the full search: every speed-up on, one
worker for turns, two for the 32-boat decision). Decisions are the same with
and without every speed-up (the golden digests in sim/compare pin them). The
scenarios are fixed: the list below is every command's.

  harbor turn        one robot's turn, 4 boats at the corner dock (5 controls)
  upkeep turn        one robot's turn, 4 robots on the demo solar park
  harbor decision    a whole one-at-a-time decision for 32 boats (32 turns)

Effort: 16 samples per Q-factor, horizon 20 (the defaults).
ns/robot-step (ns_per_robot_step in --json) divides by the robot-steps
actually simulated.`)
	blocks := fs.Int("blocks", 5, "alternating blocks (the median over them is reported)")
	blockTime := fs.Duration("block", 300*time.Millisecond, "time each configuration runs in a block (1ms..1m; at least one op runs)")
	asJSON := fs.Bool("json", false, "print one JSON object")
	if err := parse(fs, args); err != nil {
		return err
	}
	if *blocks < 1 || *blocks > 1000 {
		return fmt.Errorf("--blocks %d: want 1..1000 blocks", *blocks)
	}
	if *blockTime < time.Millisecond || *blockTime > time.Minute {
		return fmt.Errorf("--block %v: want 1ms..1m per configuration and block", *blockTime)
	}
	arms, err := searchArms()
	if err != nil {
		return err
	}
	for range *blocks {
		for _, a := range arms {
			if !a.warmedOnce {
				a.op() // buffers grown, caches warm
				a.warmedOnce = true
			}
			var ops, steps int64
			start := time.Now()
			for ops == 0 || time.Since(start) < *blockTime {
				steps += a.op()
				ops++
			}
			el := time.Since(start)
			a.opTimes = append(a.opTimes, float64(el.Nanoseconds())/float64(ops)/1000)
			a.stepTimes = append(a.stepTimes, float64(el.Nanoseconds())/float64(steps))
		}
	}
	for _, a := range arms {
		a.UsPerOp, a.NsPerStep = fleetsum.Quantile(a.opTimes, 0.5), fleetsum.Quantile(a.stepTimes, 0.5)
	}
	wake := wakeLatency(100)
	for _, a := range arms {
		if a.ref != nil {
			a.VsFull = a.UsPerOp / a.ref.UsPerOp
		}
	}
	if *asJSON {
		return json.NewEncoder(os.Stdout).Encode(map[string]any{"blocks": *blocks, "block_us": blockTime.Microseconds(), "rows": arms,
			"goroutine_wake_us": wake})
	}
	wn := len("configuration")
	for _, a := range arms {
		wn = max(wn, len(a.Name))
	}
	fmt.Printf("%-*s %7s %10s %14s %14s\n", wn, "configuration", "workers", "us/op", "ns/robot-step", "time vs first")
	for _, a := range arms {
		vs := "-"
		if a.VsFull > 0 {
			vs = fmt.Sprintf("%.2fx", a.VsFull)
		}
		fmt.Printf("%-*s %7d %10.1f %14.1f %14s\n", wn, a.Name, a.Workers, a.UsPerOp, a.NsPerStep, vs)
	}
	fmt.Printf("\nmedian over %d alternating block(s) of %v per configuration; op = one turn, or one whole decision\n", *blocks, *blockTime)
	fmt.Printf("a goroutine started on an idle core ran after %.0f us (median of 100, the starter busy meanwhile):\n"+
		"why a decision's second worker polls while turns come back to back\n", wake)
	return nil
}

// wakeLatency is the median time, in microseconds, from starting a
// goroutine to its running, with the other cores idle a moment before and
// the starter busy meanwhile (as worker 0 is): what a parked rollout
// worker costs a turn before it joins.
func wakeLatency(n int) float64 {
	lat := make([]float64, 0, n)
	for range n {
		time.Sleep(200 * time.Microsecond) // let the other cores go idle
		t0 := time.Now()
		ran := make(chan time.Time, 1)
		go func() { ran <- time.Now() }()
		for time.Since(t0) < 2*time.Millisecond { // long enough never to cap the answer
		}
		lat = append(lat, float64((<-ran).Sub(t0).Nanoseconds())/1000)
	}
	return fleetsum.Quantile(lat, 0.5)
}

func searchArms() ([]*searchArm, error) {
	hm, err := harbor.Default(4)
	if err != nil {
		return nil, err
	}
	hx := hm.NewState()
	hm.Start(hx, model.NewRNG(9).Rand)
	um, err := upkeep.Default(4)
	if err != nil {
		return nil, err
	}
	ux := um.NewState()
	um.Start(ux, nil)
	// A model's states are its own: the table-less one starts its own.
	up := um.WithoutTables()
	upx := up.NewState()
	up.Start(upx, nil)
	h32, err := harbor.Default(32)
	if err != nil {
		return nil, err
	}
	x32 := h32.NewState()
	h32.Start(x32, model.NewRNG(9).Rand)

	turn := func(name string, m model.Model, x model.State, workers int) *searchArm {
		cfg := decide.DefaultConfig()
		cfg.Workers = workers
		d := decide.New(m, cfg)
		known := make([]int, m.Robots())
		for i := range known {
			known[i] = -1
		}
		seed := uint64(0)
		return &searchArm{Name: name, Unit: "turn", Robots: m.Robots(), Workers: workers, op: func() int64 {
			seed++
			_, st := d.Turn(x, 0, known, seed%64)
			return st.Simulated * int64(m.Robots())
		}}
	}
	decision := func(name string, m model.Model, x model.State, workers int) *searchArm {
		cfg := decide.DefaultConfig()
		cfg.Workers = workers
		d := decide.New(m, cfg)
		out := make([]int, m.Robots())
		round := 0
		return &searchArm{Name: name, Unit: "decision", Robots: m.Robots(), Workers: workers, op: func() int64 {
			round++
			st := d.OneAtATime(x, nil, 1, round%16, out)
			return st.Simulated * int64(m.Robots())
		}}
	}
	const hf, uf, df = "harbor turn", "upkeep turn", "harbor decision, 32 boats"
	h1, u1, d2 := turn(hf, hm, hx, 1), turn(uf, um, ux, 1), decision(df, h32, x32, 2)
	with := func(a, ref *searchArm) *searchArm { a.ref = ref; return a }
	return []*searchArm{
		h1,
		with(turn(hf+", no aliases", noAliases{hm}, hx, 1), h1),
		with(turn(hf+", no aliases, per-boat base", noSpeedups{hm}, hx, 1), h1),
		with(turn(hf, hm, hx, 2), h1),
		u1,
		with(turn(uf+", no belief tables", up, upx, 1), u1),
		with(turn(uf, um, ux, 2), u1),
		d2,
		with(decision(df+", no aliases, per-boat base", noSpeedups{h32}, x32, 2), d2),
		with(decision(df, h32, x32, 1), d2),
	}, nil
}
