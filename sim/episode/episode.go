// Package episode plays seeded episodes of a model under a policy. Every
// policy given the same episode seed sees the same start state and the same
// world disturbances, so differences in cost are the policies', not luck.
package episode

import (
	"time"

	"baton/agentd/decide"
	"baton/sim/model"
)

// Result is one episode's outcome.
type Result struct {
	Cost      float64       // discounted sum of stage costs
	Steps     int           // steps until terminal or the horizon
	Decisions int           // decisions made (one per step)
	QFactors  int           // Q-factors evaluated in all decisions
	Simulated int64         // simulated steps inside the decisions
	Compute   time.Duration // time spent deciding (zero when now is nil)
}

// Seed of episode i of a run: the same for every policy.
func Seed(runSeed uint64, i int) uint64 { return model.Mix(runSeed, uint64(i)) }

// FleetSeed is the seed the policies' own Monte Carlo uses in an episode;
// it is distinct from the world's stream so a policy cannot foresee the
// disturbances.
func FleetSeed(episodeSeed uint64) uint64 { return model.Mix(episodeSeed, 2) }

// Start writes the episode's start state into x.
func Start(m model.Model, episodeSeed uint64, x model.State) {
	m.Start(x, model.NewRNG(model.Mix(episodeSeed, 0)).Rand)
}

// WorldSeed seeds the world's disturbance at a step (numbered from 1).
func WorldSeed(episodeSeed uint64, step int) uint64 { return model.Mix(episodeSeed, 1, uint64(step)) }

// Run plays one episode. now may be nil (no timing); it is a parameter so
// this package stays free of the wall clock.
func Run(m model.Model, p decide.Policy, episodeSeed uint64, now func() time.Time) (Result, error) {
	x := m.NewState()
	Start(m, episodeSeed, x)
	u := make([]int, m.Robots())
	rng := model.NewRNG(0)
	var res Result
	disc := 1.0
	for step := 1; step <= m.Horizon() && !m.Terminal(x); step++ {
		var t0 time.Time
		if now != nil {
			t0 = now()
		}
		st, err := p.Decide(x, step, u)
		if err != nil {
			return res, err
		}
		if now != nil {
			res.Compute += now().Sub(t0)
		}
		res.Decisions++
		res.QFactors += st.QFactors
		res.Simulated += st.Simulated
		rng.Reseed(WorldSeed(episodeSeed, step))
		res.Cost += disc * m.Step(x, u, rng.Rand)
		disc *= m.Discount()
		res.Steps = step
	}
	return res, nil
}
