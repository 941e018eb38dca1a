package cli

import (
	"encoding/json"
	"fmt"
	"os"

	"baton/sim/exact"
	"baton/sim/model"
)

func cmdExact(args []string) error {
	fs := newFlags("exact", "Enumerates a tiny fully observed instance and prints the exact discounted cost\nfrom its start state of the optimal policy (value iteration), the base policy,\nand all-at-once and one-at-a-time rollout with exact Q-factors.")
	var sc scenarioFlags
	sc.register(fs)
	fs.Lookup("config").Usage = "tiny scenario YAML file (required; e.g. deploy/examples/harbor-tiny.yaml)"
	maxStates := fs.Int("max-states", 20000, "refuse instances with more reachable states than this")
	seed := fs.Uint64("seed", 1, "seed for scenarios whose start state is drawn at random")
	asJSON := fs.Bool("json", false, "print one JSON object")
	if err := parse(fs, args); err != nil {
		return err
	}
	if sc.file == "" {
		return fmt.Errorf("--config FILE is required: the built-in demos are far too large to enumerate")
	}
	m, err := sc.load()
	if err != nil {
		return err
	}
	em, ok := m.(model.Enumerable)
	if !ok {
		return fmt.Errorf("scenario %s cannot be enumerated", m.Name())
	}
	if m.Discount() >= 1 {
		return fmt.Errorf("%s: exact costs need a discount below 1 (set discount: 0.95, say), got %g", sc.file, m.Discount())
	}
	start := m.NewState()
	m.Start(start, model.NewRNG(*seed).Rand)
	rep, err := exact.Solve(em, start, *maxStates)
	if err != nil {
		return fmt.Errorf("%s: %w", sc.file, err)
	}
	if *asJSON {
		return json.NewEncoder(os.Stdout).Encode(rep)
	}
	fmt.Printf("%s: %d states, discount %g\n", sc.file, rep.States, m.Discount())
	fmt.Printf("  optimal        %.6f\n  base           %.6f\n  all-at-once    %.6f\n  one-at-a-time  %.6f\n",
		rep.Optimal, rep.Base, rep.AllAtOnce, rep.OneAtATime)
	return nil
}
