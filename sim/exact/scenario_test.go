package exact_test

import (
	"fmt"
	"testing"

	"baton/sim/exact"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// scenarioMaxStates bounds each random tiny instance; far above what the
// generators are meant to produce, so hitting it means a generator bug.
const scenarioMaxStates = 3000

// TestScenarioTheorems checks on random tiny instances of the real
// scenarios, with exact Q-factors, the cost improvement property of
// multiagent rollout (arXiv:1910.00120): all-at-once and one-at-a-time
// rollout on the base policy cost no more than the base policy at every
// state; value iteration's optimum is below both; and repeated
// one-at-a-time improvement reaches an agent-by-agent optimal fixed point.
func TestScenarioTheorems(t *testing.T) {
	scenarios := []struct {
		name string
		tiny func(seed uint64) model.Enumerable
	}{
		{"harbor", func(seed uint64) model.Enumerable { return harbor.RandomTiny(seed) }},
		{"upkeep", func(seed uint64) model.Enumerable { return upkeep.RandomTiny(seed) }},
	}
	for _, sc := range scenarios {
		for seed := uint64(1); seed <= 20; seed++ {
			t.Run(fmt.Sprintf("%s/seed=%d", sc.name, seed), func(t *testing.T) {
				t.Parallel()
				m := sc.tiny(seed)
				start := m.NewState()
				m.Start(start, model.NewRNG(seed).Rand)
				sp, err := exact.Enumerate(m, start, scenarioMaxStates)
				if err != nil {
					t.Fatal(err)
				}
				checkScenario(t, sp)
			})
		}
	}
}

func checkScenario(t *testing.T, sp *exact.Space) {
	const tol = 1e-9
	robots := sp.Robots()
	order := make([]int, robots)
	reversed := make([]int, robots)
	for r := range order {
		order[r], reversed[r] = r, robots-1-r
	}

	base := exact.BasePolicy(sp)
	Jb, err := exact.EvaluatePolicy(sp, base)
	if err != nil {
		t.Fatal(err)
	}
	Jopt, _, err := exact.Optimal(sp)
	if err != nil {
		t.Fatal(err)
	}
	all := exact.AllAtOnce(sp, Jb)
	Ja, err := exact.EvaluatePolicy(sp, all.Policy)
	if err != nil {
		t.Fatal(err)
	}
	check := func(what string, J []float64) {
		for x := range sp.Len() {
			if J[x] > Jb[x]+tol {
				t.Errorf("%s: state %d: rollout cost %v > base cost %v", what, x, J[x], Jb[x])
			}
			if Jopt[x] > J[x]+tol {
				t.Errorf("%s: state %d: optimum %v > rollout cost %v", what, x, Jopt[x], J[x])
			}
		}
	}
	check("all-at-once", Ja)
	var Jo []float64
	for _, ord := range [][]int{order, reversed} {
		one := exact.OneAtATime(sp, base, Jb, ord)
		J, err := exact.EvaluatePolicy(sp, one.Policy)
		if err != nil {
			t.Fatal(err)
		}
		check(fmt.Sprintf("one-at-a-time %v", ord), J)
		if Jo == nil {
			Jo = J
		}
	}

	imp, err := exact.ImproveUntilStable(sp, base, order, 50)
	if err != nil {
		t.Fatal(err)
	}
	if !exact.AgentByAgentOptimal(sp, imp.Policy, imp.J, tol) {
		t.Error("fixed point of one-at-a-time improvement is not agent-by-agent optimal")
	}
	for i := 1; i < len(imp.Costs); i++ {
		if imp.Costs[i] > imp.Costs[i-1]+tol {
			t.Errorf("improvement raised the start cost: %v", imp.Costs)
		}
	}
	for x := range sp.Len() {
		if imp.J[x] < Jopt[x]-tol {
			t.Errorf("state %d: fixed point %v below the optimum %v", x, imp.J[x], Jopt[x])
		}
	}
	t.Logf("%d states, %d robots: base %.4f, all-at-once %.4f, one-at-a-time %.4f, optimum %.4f, fixed point %.4f after %d steps",
		sp.Len(), robots, Jb[0], Ja[0], Jo[0], Jopt[0], imp.J[0], imp.Steps)
}
