package cli

import (
	"encoding/json"
	"fmt"
	"os"
	"strings"
	"time"

	"baton/agentd/decide"
	"baton/sim/auction"
	"baton/sim/compare"
)

func cmdCompare(args []string) error {
	fs := newFlags("compare", "Runs policies (by default base, all-at-once and one-at-a-time rollout; also the\nassignment and auction baselines and rollout on them) on the same seeded episodes\nand prints mean cost (95% CI), mean steps, Q-factors, milliseconds, messages\nbetween robots and, for the auction, bidding rounds per decision.\n\nMessages are counted as a fleet would exchange them: none for base, assignment\nand all-at-once (computed alike from the shared state, or by one process), each\nrobot's decision to every other for one-at-a-time rollout (m(m-1)), and one per\nrobot per neighbour per bidding round for the auction, whose rounds include those\nthat confirm nothing changes any more.")
	var sc scenarioFlags
	sc.register(fs)
	episodes := fs.Int("episodes", 30, "seeded episodes per policy")
	seed := fs.Uint64("seed", 1, "run seed (the same seed replays the same run)")
	var opts compare.Options
	dc := decide.DefaultConfig()
	dc.RegisterFlags(fs)
	maxJoint := fs.Int("max-joint", 1000, "largest number of joint controls for which all-at-once is run")
	policies := fs.String("policies", "base,all-at-once,one-at-a-time", "comma-separated policies to run: base, all-at-once, one-at-a-time, "+
		"assignment (each step, robots to targets by an optimal assignment, then a step along a shortest path), one-at-a-time+assignment (rollout with the assignment policy as its base), "+
		"auction (each step, a consensus-based bundle auction among the robots, then a step toward each robot's first target), one-at-a-time+auction (rollout on the auction)")
	fs.Float64Var(&opts.Auction.Lambda, "auction-lambda", 0.9, "auction: a target's worth shrinks by this factor per step of travel, in (0,1)")
	fs.IntVar(&opts.Auction.Bundle, "auction-bundle", 2, "auction: most targets one robot bids for (1..64)")
	fs.IntVar(&opts.Auction.Range, "auction-range", 0, "auction: robots hear each other within this distance (harbor: grid steps; upkeep: roads; 0: all hear all)")
	order := fs.String("order", "", "one-at-a-time turn order, e.g. 2,0,1 (default 0..m-1)")
	fs.IntVar(&dc.Workers, "workers", 0, "goroutines per decision (default: all cores)")
	asJSON := fs.Bool("json", false, "print one JSON object instead of the table")
	if err := parse(fs, args); err != nil {
		return err
	}
	if err := dc.Validate(); err != nil {
		return err
	}
	switch a := opts.Auction; {
	case !(a.Lambda > 0 && a.Lambda < 1):
		return fmt.Errorf("--auction-lambda %v: want a factor in (0,1)", a.Lambda)
	case a.Bundle < 1 || a.Bundle > auction.MaxBundle:
		return fmt.Errorf("--auction-bundle %d: want 1..%d targets", a.Bundle, auction.MaxBundle)
	case a.Range < 0:
		return fmt.Errorf("--auction-range %d: want a distance >= 0 (0: all hear all)", a.Range)
	}
	m, err := sc.load()
	if err != nil {
		return err
	}
	ord, err := parseOrder(*order)
	if err != nil {
		return err
	}
	opts.Episodes, opts.Seed, opts.MaxJoint, opts.Order, opts.Now = *episodes, *seed, *maxJoint, ord, time.Now
	opts.Decide = dc
	for _, name := range strings.Split(*policies, ",") {
		opts.Policies = append(opts.Policies, strings.TrimSpace(name))
	}
	opts.Progress = progress("episodes")
	rep, err := compare.Run(m, opts)
	if err != nil {
		return err
	}
	if *asJSON {
		enc := json.NewEncoder(os.Stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(rep)
	}
	rep.WriteTable(os.Stdout)
	return nil
}
