package decide_test

import (
	"math"
	"testing"

	"baton/agentd/decide"
	"baton/sim/exact"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// With enough samples the Monte Carlo Q-factors agree with the exact ones
// (linear-solve evaluation of the base policy, sim/exact) within their
// confidence interval. 99.9% intervals (3.29 standard errors) so the
// handful of candidates per instance do not fail by multiplicity; the
// truncation bias a^(H+1) * max cost / (1-a) is below 1e-6 here.
func TestMonteCarloMatchesExactQ(t *testing.T) {
	example, err := harbor.Load("../../deploy/examples/harbor-tiny.yaml", 0)
	if err != nil {
		t.Fatal(err)
	}
	models := []model.Enumerable{harbor.RandomTiny(4), example, upkeep.RandomTiny(3), upkeep.RandomTiny(8)}
	for i, m := range models {
		start := m.NewState()
		m.Start(start, model.NewRNG(1).Rand)
		sp, err := exact.Enumerate(m, start, 5000)
		if err != nil {
			t.Fatal(err)
		}
		jb, err := exact.EvaluatePolicy(sp, exact.BasePolicy(sp))
		if err != nil {
			t.Fatal(err)
		}
		h := int(math.Ceil(math.Log(1e-8) / math.Log(m.Discount())))
		d := decide.New(m, decide.Config{Samples: 6000, Horizon: h})
		x0, ok := sp.Index(m.Key(start))
		if !ok {
			t.Fatal("start state not enumerated")
		}
		u := make([]int, m.Robots())
		for c := range m.NumControls(start, 0) {
			model.BaseJoint(m, start, u)
			u[0] = c
			est, _ := d.QFactors(start, [][]int{u}, uint64(100+c))
			want := sp.Q(x0, sp.Encode(x0, u), jb)
			t.Logf("model %d control %d: mc %.4f±%.4f exact %.4f", i, c, est[0].Mean, est[0].StdErr, want)
			if diff := math.Abs(est[0].Mean - want); diff > 3.29*est[0].StdErr+1e-6 {
				t.Errorf("model %d control %d: Monte Carlo %.4f ± %.4f, exact %.4f (%.1f se)",
					i, c, est[0].Mean, est[0].StdErr, want, diff/est[0].StdErr)
			}
		}
	}
}
