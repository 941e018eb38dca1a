package cli

import (
	"encoding/json"
	"os"
	"strings"
	"time"

	"baton/agentd/decide"
	"baton/sim/compare"
)

func cmdCompare(args []string) error {
	fs := newFlags("compare", "Runs base, all-at-once and one-at-a-time rollout on the same seeded episodes\nand prints mean cost (95% CI), mean steps, Q-factors and milliseconds per decision.")
	var sc scenarioFlags
	sc.register(fs)
	episodes := fs.Int("episodes", 30, "seeded episodes per policy")
	seed := fs.Uint64("seed", 1, "run seed (the same seed replays the same run)")
	dc := decide.DefaultConfig()
	dc.RegisterFlags(fs)
	maxJoint := fs.Int("max-joint", 1000, "largest number of joint controls for which all-at-once is run")
	policies := fs.String("policies", "base,all-at-once,one-at-a-time", "comma-separated policies to run: base, all-at-once, one-at-a-time, "+
		"assignment (each step, robots to targets by an optimal assignment, then a step along a shortest path), one-at-a-time+assignment (rollout with the assignment policy as its base)")
	order := fs.String("order", "", "one-at-a-time turn order, e.g. 2,0,1 (default 0..m-1)")
	fs.IntVar(&dc.Workers, "workers", 0, "goroutines per decision (default: all cores)")
	asJSON := fs.Bool("json", false, "print one JSON object instead of the table")
	if err := parse(fs, args); err != nil {
		return err
	}
	if err := dc.Validate(); err != nil {
		return err
	}
	m, err := sc.load()
	if err != nil {
		return err
	}
	ord, err := parseOrder(*order)
	if err != nil {
		return err
	}
	opts := compare.Options{
		Episodes: *episodes, Seed: *seed, MaxJoint: *maxJoint, Order: ord, Now: time.Now,
		Decide: dc, Policies: strings.Split(*policies, ","),
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
