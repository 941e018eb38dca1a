package exact

import (
	"fmt"
	"math"

	"baton/sim/model"
)

// BasePolicy is the model's base policy (model.Base for every robot).
func BasePolicy(sp *Space) Policy { return append(Policy(nil), sp.base...) }

// EvaluatePolicy is the exact cost J_mu of mu at every state (see Evaluate).
func EvaluatePolicy(sp *Space, mu Policy) ([]float64, error) {
	return Evaluate(sp.MDP, mu)
}

// Optimal returns the optimal cost and an optimal policy. Value iteration
// gets close; policy iteration from its greedy policy then makes the result
// exact, because value iteration's stopping rule alone leaves an error of up
// to Tol*a/(1-a), too coarse for comparisons at 1e-9.
func Optimal(sp *Space) ([]float64, Policy, error) {
	vi, err := ValueIteration(sp.MDP, VIOptions{Tol: 1e-9})
	if err != nil {
		return nil, nil, err
	}
	J, pol, _, err := PolicyIteration(sp.MDP, vi.Policy, 0)
	return J, pol, err
}

// Decisions is a rollout policy with the cost of computing it.
type Decisions struct {
	Policy Policy
	// QEvals is the number of Q-factors evaluated to decide at each state
	// (0 at terminal states).
	QEvals []int
}

// TotalQEvals sums QEvals.
func (d Decisions) TotalQEvals() int {
	t := 0
	for _, q := range d.QEvals {
		t += q
	}
	return t
}

// AllAtOnce is rollout over the whole joint control: at every state the
// joint control minimising Q_mu(x,u) against Jmu, lowest joint index on
// ties. It costs the product of the robots' control counts per decision.
func AllAtOnce(sp *Space, Jmu []float64) Decisions {
	d := Decisions{Policy: make(Policy, sp.Len()), QEvals: make([]int, sp.Len())}
	for x := range sp.Len() {
		best := math.Inf(1)
		for j := range sp.NumJoint(x) {
			if q := sp.Q(x, j, Jmu); q < best {
				best, d.Policy[x] = q, j
			}
		}
		d.QEvals[x] = sp.NumJoint(x)
	}
	return d
}

// OneAtATime is multiagent rollout: robots take turns in order; robot k
// minimises Q_mu(x,u) over its own control, with robots earlier in the order
// at their new choices and later ones at mu's control in x. A robot keeps
// mu's control unless another beats it by more than rounding noise (without
// that, repeated improvement need not terminate), else it takes the lowest
// control index attaining the minimum. It costs the sum of the robots'
// control counts per decision. It panics if order is not a permutation of
// the robots.
func OneAtATime(sp *Space, mu Policy, Jmu []float64, order []int) Decisions {
	checkOrder(sp.Robots(), order)
	d := Decisions{Policy: make(Policy, sp.Len()), QEvals: make([]int, sp.Len())}
	u := make([]int, sp.Robots())
	var q []float64
	for x := range sp.Len() {
		if sp.Terminal(x) {
			continue
		}
		sp.Decode(x, mu[x], u)
		for _, r := range order {
			n := sp.Controls(x, r)
			q = q[:0]
			qmin := math.Inf(1)
			for c := range n {
				u[r] = c
				q = append(q, sp.Q(x, sp.Encode(x, u), Jmu))
				qmin = min(qmin, q[c])
			}
			d.QEvals[x] += n
			keep := sp.controlOf(x, mu[x], r)
			u[r] = keep
			if improves(qmin, q[keep]) {
				for c := range n {
					if q[c] < q[keep] && !improves(qmin, q[c]) {
						u[r] = c
						break
					}
				}
			}
		}
		d.Policy[x] = sp.Encode(x, u)
	}
	return d
}

// controlOf is robot r's control within joint control j of state x.
func (sp *Space) controlOf(x, j, r int) int {
	nc := sp.controls[x]
	for i := len(nc) - 1; i > r; i-- {
		j /= nc[i]
	}
	return j % nc[r]
}

func checkOrder(robots int, order []int) {
	if len(order) != robots {
		panic(fmt.Sprintf("exact: order %v has %d entries for %d robots", order, len(order), robots))
	}
	seen := make([]bool, robots)
	for _, r := range order {
		if r < 0 || r >= robots || seen[r] {
			panic(fmt.Sprintf("exact: order %v is not a permutation of 0..%d", order, robots-1))
		}
		seen[r] = true
	}
}

// Improvement is the result of ImproveUntilStable.
type Improvement struct {
	// Policy is the final policy, a fixed point of one-at-a-time improvement.
	Policy Policy
	// J is its exact cost at every state.
	J []float64
	// Costs[i] is J_{mu_i} at the start state, for mu_0 (the given policy)
	// up to the final one.
	Costs []float64
	// Steps is the number of improvement steps that changed the policy.
	Steps int
}

// ImproveUntilStable repeats exact one-at-a-time improvement,
// mu_{i+1} = OneAtATime(mu_i, J_{mu_i}), until the policy stops changing.
// Every changing step lowers J strictly at some state and raises it nowhere,
// so it terminates; it returns an error (and the last policy) if that takes
// more than maxIter steps.
func ImproveUntilStable(sp *Space, mu0 Policy, order []int, maxIter int) (Improvement, error) {
	mu := append(Policy(nil), mu0...)
	var imp Improvement
	for {
		J, err := EvaluatePolicy(sp, mu)
		if err != nil {
			return imp, err
		}
		imp.Policy, imp.J = mu, J
		imp.Costs = append(imp.Costs, J[0])
		next := OneAtATime(sp, mu, J, order).Policy
		if samePolicy(sp, mu, next) {
			return imp, nil
		}
		if imp.Steps >= maxIter {
			return imp, fmt.Errorf("exact: one-at-a-time improvement not stable after %d steps", maxIter)
		}
		imp.Steps++
		mu = next
	}
}

func samePolicy(sp *Space, a, b Policy) bool {
	for x := range a {
		if !sp.Terminal(x) && a[x] != b[x] {
			return false
		}
	}
	return true
}

// AgentByAgentOptimal reports whether no single robot can lower Q_mu(x,.)
// by more than tol by changing only its own control, at any state, with J
// the cost of mu.
func AgentByAgentOptimal(sp *Space, mu Policy, J []float64, tol float64) bool {
	u := make([]int, sp.Robots())
	for x := range sp.Len() {
		if sp.Terminal(x) {
			continue
		}
		ref := sp.Q(x, mu[x], J)
		sp.Decode(x, mu[x], u)
		for r := range u {
			keep := u[r]
			for c := range sp.Controls(x, r) {
				u[r] = c
				if sp.Q(x, sp.Encode(x, u), J) < ref-tol {
					return false
				}
			}
			u[r] = keep
		}
	}
	return true
}

// Report is the exact discounted cost at the start state of the optimal,
// base and both rollout policies (rollout against the base policy, robots
// in index order), with the number of enumerated states.
type Report struct {
	Optimal    float64 `json:"optimal"`
	Base       float64 `json:"base"`
	AllAtOnce  float64 `json:"all_at_once"`
	OneAtATime float64 `json:"one_at_a_time"`
	States     int     `json:"states"`
}

// Solve enumerates m from start (refusing more than maxStates states) and
// reports the exact costs of the optimal, base and rollout policies there.
func Solve(m model.Enumerable, start model.State, maxStates int) (Report, error) {
	sp, err := Enumerate(m, start, maxStates)
	if err != nil {
		return Report{}, err
	}
	rep := Report{States: sp.Len()}
	base := BasePolicy(sp)
	Jb, err := EvaluatePolicy(sp, base)
	if err != nil {
		return rep, fmt.Errorf("base policy: %w", err)
	}
	rep.Base = Jb[0]
	Ja, err := EvaluatePolicy(sp, AllAtOnce(sp, Jb).Policy)
	if err != nil {
		return rep, fmt.Errorf("all-at-once rollout: %w", err)
	}
	rep.AllAtOnce = Ja[0]
	order := make([]int, sp.Robots())
	for r := range order {
		order[r] = r
	}
	Jo, err := EvaluatePolicy(sp, OneAtATime(sp, base, Jb, order).Policy)
	if err != nil {
		return rep, fmt.Errorf("one-at-a-time rollout: %w", err)
	}
	rep.OneAtATime = Jo[0]
	Jopt, _, err := Optimal(sp)
	if err != nil {
		return rep, fmt.Errorf("optimal: %w", err)
	}
	rep.Optimal = Jopt[0]
	return rep, nil
}

// RolloutOnBaseNoWorse checks the cost improvement property for m's base
// policy, whatever it is: m (a model.Enumerable) is started from the
// start NewRNG(seed) draws and enumerated (at most maxStates states), and
// the error names the first state where one-at-a-time rollout on m's base
// policy, in robot order, costs more than the base policy (beyond 1e-9
// relative), both evaluated exactly.
func RolloutOnBaseNoWorse(m model.Model, seed uint64, maxStates int) error {
	e, ok := m.(model.Enumerable)
	if !ok {
		return fmt.Errorf("%s: not enumerable", m.Name())
	}
	start := m.NewState()
	m.Start(start, model.NewRNG(seed).Rand)
	sp, err := Enumerate(e, start, maxStates)
	if err != nil {
		return err
	}
	mu := BasePolicy(sp)
	Jbase, err := EvaluatePolicy(sp, mu)
	if err != nil {
		return fmt.Errorf("base policy: %w", err)
	}
	order := make([]int, sp.Robots())
	for r := range order {
		order[r] = r
	}
	Jroll, err := EvaluatePolicy(sp, OneAtATime(sp, mu, Jbase, order).Policy)
	if err != nil {
		return fmt.Errorf("one-at-a-time rollout: %w", err)
	}
	for x := range Jroll {
		if Jroll[x] > Jbase[x]+1e-9*(1+Jbase[x]) {
			return fmt.Errorf("state %d: rollout on the base policy costs %.9g, the base policy %.9g", x, Jroll[x], Jbase[x])
		}
	}
	return nil
}
