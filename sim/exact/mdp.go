// Package exact solves tiny instances exactly: value iteration, policy
// iteration and exact policy evaluation on an enumerated finite MDP, plus
// exact-Q-factor rollout (all-at-once and one-agent-at-a-time) over a
// model.Enumerable scenario.
//
// It exists so that the cost-improvement claims of multiagent rollout
// (arXiv:1910.00120) can be checked without Monte Carlo noise. Everything is
// cost minimisation over an infinite horizon (model.Horizon is ignored) and
// fully deterministic.
package exact

import (
	"errors"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// Transition is one possible next state of an action and its probability.
type Transition struct {
	To int
	P  float64
}

// Action is one control available in a state.
type Action struct {
	// Cost is the expected stage cost of the action.
	Cost float64
	// Next is the sparse distribution of the next state (probabilities sum to 1).
	Next []Transition
}

// MDP is an enumerated finite Markov decision problem (cost minimisation).
type MDP struct {
	// Actions lists the actions of every state; ignored at terminal states.
	Actions [][]Action
	// Terminal marks absorbing states, whose cost-to-go is fixed at
	// TerminalValue. A nil slice means no terminal states.
	Terminal []bool
	// TerminalValue is J at terminal states; nil means 0 everywhere.
	TerminalValue []float64
	// Discount is a in (0,1]. With a = 1 every evaluated policy must reach a
	// terminal state (stochastic shortest path), else evaluation refuses.
	Discount float64
}

// N is the number of states.
func (p *MDP) N() int { return len(p.Actions) }

// IsTerminal reports whether x is a terminal state.
func (p *MDP) IsTerminal(x int) bool { return p.Terminal != nil && p.Terminal[x] }

func (p *MDP) terminalValue(x int) float64 {
	if p.TerminalValue == nil {
		return 0
	}
	return p.TerminalValue[x]
}

// probTol is how far a transition distribution may sum away from 1.
const probTol = 1e-9

// Validate checks shapes, the discount and every distribution.
func (p *MDP) Validate() error {
	n := p.N()
	if !(p.Discount > 0 && p.Discount <= 1) {
		return fmt.Errorf("exact: discount %v not in (0,1]", p.Discount)
	}
	if p.Terminal != nil && len(p.Terminal) != n {
		return fmt.Errorf("exact: %d terminal flags for %d states", len(p.Terminal), n)
	}
	if p.TerminalValue != nil && len(p.TerminalValue) != n {
		return fmt.Errorf("exact: %d terminal values for %d states", len(p.TerminalValue), n)
	}
	for x, acts := range p.Actions {
		if p.IsTerminal(x) {
			continue
		}
		if len(acts) == 0 {
			return fmt.Errorf("exact: non-terminal state %d has no actions", x)
		}
		for a, act := range acts {
			if err := checkDist(n, act.Next); err != nil {
				return fmt.Errorf("exact: state %d action %d: %w", x, a, err)
			}
			if math.IsNaN(act.Cost) || math.IsInf(act.Cost, 0) {
				return fmt.Errorf("exact: state %d action %d: cost %v", x, a, act.Cost)
			}
		}
	}
	return nil
}

func checkDist(n int, next []Transition) error {
	sum := 0.0
	for _, t := range next {
		if t.To < 0 || t.To >= n {
			return fmt.Errorf("next state %d out of range [0,%d)", t.To, n)
		}
		if !(t.P >= 0) {
			return fmt.Errorf("probability %v of next state %d", t.P, t.To)
		}
		sum += t.P
	}
	if math.Abs(sum-1) > probTol {
		return fmt.Errorf("probabilities sum to %v, not 1", sum)
	}
	return nil
}

// Q is the Q-factor of action a in state x against cost-to-go J:
// cost + discount * sum_y P(y) J(y).
func (p *MDP) Q(x, a int, J []float64) float64 {
	act := &p.Actions[x][a]
	s := 0.0
	for _, t := range act.Next {
		s += t.P * J[t.To]
	}
	return act.Cost + p.Discount*s
}

// VIOptions configures ValueIteration; zero fields take the defaults.
type VIOptions struct {
	// Tol stops iteration once the Bellman error max_x |TJ(x) - J(x)| is at
	// most Tol (default 1e-10).
	Tol float64
	// MaxIter bounds the number of Bellman sweeps (default 1e6).
	MaxIter int
}

// VIResult is the outcome of ValueIteration.
type VIResult struct {
	J      []float64
	Policy []int // greedy with respect to J (lowest action index on ties); 0 at terminal states
	Iter   int   // Bellman sweeps performed
	// Residual is the final Bellman error. For a < 1 the distance to the
	// optimum is at most Residual * a / (1 - a).
	Residual float64
}

// ValueIteration runs synchronous (Jacobi) value iteration from J = 0 on
// non-terminal states. It returns an error, with the last iterate, when the
// Bellman error has not dropped to Tol within MaxIter sweeps (for a = 1 that
// is what happens when some state cannot reach a terminal state).
func ValueIteration(p *MDP, opt VIOptions) (VIResult, error) {
	if err := p.Validate(); err != nil {
		return VIResult{}, err
	}
	tol, maxIter := opt.Tol, opt.MaxIter
	if tol <= 0 {
		tol = 1e-10
	}
	if maxIter <= 0 {
		maxIter = 1_000_000
	}
	n := p.N()
	J := make([]float64, n)
	next := make([]float64, n)
	for x := range n {
		if p.IsTerminal(x) {
			J[x] = p.terminalValue(x)
			next[x] = J[x]
		}
	}
	res := VIResult{Residual: math.Inf(1)}
	for res.Iter < maxIter {
		res.Iter++
		res.Residual = 0
		for x := range n {
			if p.IsTerminal(x) {
				continue
			}
			best := math.Inf(1)
			for a := range p.Actions[x] {
				best = min(best, p.Q(x, a, J))
			}
			next[x] = best
			res.Residual = max(res.Residual, math.Abs(best-J[x]))
		}
		J, next = next, J
		if res.Residual <= tol {
			break
		}
	}
	res.J = J
	res.Policy = Greedy(p, J)
	if res.Residual > tol {
		return res, fmt.Errorf("exact: value iteration did not converge in %d sweeps (Bellman error %g > %g)", res.Iter, res.Residual, tol)
	}
	return res, nil
}

// Greedy returns the policy minimising the Q-factor against J in every
// non-terminal state, lowest action index on exact ties; 0 at terminal states.
func Greedy(p *MDP, J []float64) []int {
	pol := make([]int, p.N())
	for x := range pol {
		if p.IsTerminal(x) {
			continue
		}
		best := math.Inf(1)
		for a := range p.Actions[x] {
			if q := p.Q(x, a, J); q < best {
				best, pol[x] = q, a
			}
		}
	}
	return pol
}

// tieTol is the relative margin by which a Q-factor must beat the incumbent
// before an improvement step switches to it. Without it, rounding noise in
// two exactly tied Q-factors can make repeated improvement cycle forever.
const tieTol = 1e-11

// improves reports whether q beats ref by more than rounding noise.
func improves(q, ref float64) bool { return q < ref-tieTol*(1+math.Abs(ref)) }

// PolicyIteration runs exact policy iteration from init (nil: action 0
// everywhere). An action changes only when another improves its Q-factor by
// more than rounding noise, so the loop terminates. It returns the optimal
// J, the final policy and the number of improvement steps; maxIter <= 0
// means 1000.
func PolicyIteration(p *MDP, init []int, maxIter int) ([]float64, []int, int, error) {
	if maxIter <= 0 {
		maxIter = 1000
	}
	pol := make([]int, p.N())
	if init != nil {
		copy(pol, init)
	}
	for it := 0; ; it++ {
		J, err := Evaluate(p, pol)
		if err != nil {
			return nil, pol, it, err
		}
		changed := false
		for x := range pol {
			if p.IsTerminal(x) {
				continue
			}
			cur, best := pol[x], p.Q(x, pol[x], J)
			for a := range p.Actions[x] {
				if q := p.Q(x, a, J); improves(q, best) {
					best, pol[x] = q, a
				}
			}
			changed = changed || pol[x] != cur
		}
		if !changed {
			return J, pol, it, nil
		}
		if it+1 >= maxIter {
			return J, pol, it + 1, fmt.Errorf("exact: policy iteration not stable after %d steps", maxIter)
		}
	}
}

// Evaluate computes J_mu exactly for the deterministic policy mu (action
// index per state; ignored at terminal states).
//
// It solves (I - a P_mu) J = g_mu over the non-terminal states: by dense LU
// when there are at most 3000 of them, otherwise by Gauss-Seidel sweeps to an
// estimated error of 1e-12 * max(1, max|J|) (dense LU needs N^2 memory and
// N^3 time, which stops paying off there; see gaussSeidel). With a = 1
// it first checks that every non-terminal state reaches a terminal state
// under mu and returns an error if not, since the system is then singular.
func Evaluate(p *MDP, mu []int) ([]float64, error) {
	if err := p.Validate(); err != nil {
		return nil, err
	}
	n := p.N()
	if len(mu) != n {
		return nil, fmt.Errorf("exact: policy has %d entries for %d states", len(mu), n)
	}
	cost := make([]float64, n)
	next := make([][]Transition, n)
	for x := range n {
		if p.IsTerminal(x) {
			continue
		}
		if mu[x] < 0 || mu[x] >= len(p.Actions[x]) {
			return nil, fmt.Errorf("exact: policy action %d out of range at state %d (%d actions)", mu[x], x, len(p.Actions[x]))
		}
		act := p.Actions[x][mu[x]]
		cost[x], next[x] = act.Cost, act.Next
	}
	return p.solveChain(cost, next)
}

// EvaluateRandomized computes J_pi exactly for a randomized policy:
// probs[x][a] is the probability of action a in state x (ignored at
// terminal states). Same method and refusals as Evaluate.
func EvaluateRandomized(p *MDP, probs [][]float64) ([]float64, error) {
	if err := p.Validate(); err != nil {
		return nil, err
	}
	n := p.N()
	if len(probs) != n {
		return nil, fmt.Errorf("exact: policy has %d entries for %d states", len(probs), n)
	}
	cost := make([]float64, n)
	next := make([][]Transition, n)
	for x := range n {
		if p.IsTerminal(x) {
			continue
		}
		if len(probs[x]) != len(p.Actions[x]) {
			return nil, fmt.Errorf("exact: state %d: %d action probabilities for %d actions", x, len(probs[x]), len(p.Actions[x]))
		}
		// Mix the actions into one row, merging equal next states.
		slot := map[int]int{}
		sum := 0.0
		for a, q := range probs[x] {
			if !(q >= 0) {
				return nil, fmt.Errorf("exact: state %d: action probability %v", x, q)
			}
			sum += q
			if q == 0 {
				continue
			}
			act := p.Actions[x][a]
			cost[x] += q * act.Cost
			for _, t := range act.Next {
				if i, ok := slot[t.To]; ok {
					next[x][i].P += q * t.P
				} else {
					slot[t.To] = len(next[x])
					next[x] = append(next[x], Transition{t.To, q * t.P})
				}
			}
		}
		if math.Abs(sum-1) > probTol {
			return nil, fmt.Errorf("exact: state %d: action probabilities sum to %v", x, sum)
		}
	}
	return p.solveChain(cost, next)
}

// denseLimit is the largest number of non-terminal states solved by dense
// LU; a variable so tests can exercise the Gauss-Seidel path cheaply.
var denseLimit = 3000

// ErrSingular is wrapped by evaluation errors caused by a singular system.
var ErrSingular = errors.New("singular system")

// solveChain returns J for the Markov chain with expected stage cost cost[x]
// and next-state rows next[x] at the non-terminal states.
func (p *MDP) solveChain(cost []float64, next [][]Transition) ([]float64, error) {
	n, a := p.N(), p.Discount
	J := make([]float64, n)
	idx := make([]int, n) // position among non-terminal states, -1 if terminal
	k := 0
	for x := range n {
		if p.IsTerminal(x) {
			J[x] = p.terminalValue(x)
			idx[x] = -1
		} else {
			idx[x] = k
			k++
		}
	}
	if a == 1 {
		if x, ok := neverTerminates(p, next); ok {
			return nil, fmt.Errorf("exact: with discount 1 the policy never reaches a terminal state from state %d, so I - P is %w; use a discount below 1", x, ErrSingular)
		}
	}
	// b = g + a * (expected terminal value reached in one step).
	b := make([]float64, k)
	for x := range n {
		if i := idx[x]; i >= 0 {
			b[i] = cost[x]
			for _, t := range next[x] {
				if idx[t.To] < 0 {
					b[i] += a * t.P * J[t.To]
				}
			}
		}
	}
	if k == 0 {
		return J, nil
	}
	if k <= denseLimit {
		A := mat.NewDense(k, k, nil)
		for x := range n {
			i := idx[x]
			if i < 0 {
				continue
			}
			A.Set(i, i, A.At(i, i)+1)
			for _, t := range next[x] {
				if j := idx[t.To]; j >= 0 {
					A.Set(i, j, A.At(i, j)-a*t.P)
				}
			}
		}
		var lu mat.LU
		lu.Factorize(A)
		var sol mat.VecDense
		if err := lu.SolveVecTo(&sol, false, mat.NewVecDense(k, b)); err != nil {
			return nil, fmt.Errorf("exact: policy evaluation: %w (%v)", ErrSingular, err)
		}
		for x := range n {
			if i := idx[x]; i >= 0 {
				J[x] = sol.AtVec(i)
			}
		}
		return J, nil
	}
	return J, gaussSeidel(p, J, idx, b, next)
}

// gsMaxSweeps bounds Gauss-Seidel sweeps.
const gsMaxSweeps = 1_000_000

// gaussSeidel solves the chain in place into J (terminal entries preset).
//
// A small change per sweep does not mean a small error when the chain
// contracts slowly, so it stops on an error estimate instead: the last
// change times rho/(1-rho), rho being the observed contraction of the change
// over the last two sweeps. It also stops once the change is down to
// rounding level, where no further sweep can help.
func gaussSeidel(p *MDP, J []float64, idx []int, b []float64, next [][]Transition) error {
	a := p.Discount
	var prev, prevRho float64
	for sweep := 0; sweep < gsMaxSweeps; sweep++ {
		change, scale := 0.0, 1.0
		for x := range J {
			i := idx[x]
			if i < 0 {
				continue
			}
			s, self := b[i], 0.0
			for _, t := range next[x] {
				switch {
				case t.To == x:
					self += t.P
				case idx[t.To] >= 0:
					s += a * t.P * J[t.To]
				}
			}
			v := s / (1 - a*self)
			change = max(change, math.Abs(v-J[x]))
			scale = max(scale, math.Abs(v))
			J[x] = v
		}
		if change <= 4*epsilon*scale {
			return nil
		}
		if sweep > 0 {
			// The larger of the last two ratios, so one lucky sweep is not enough.
			rho := change / prev
			if sweep > 1 && rho < 1 && prevRho < 1 && change*max(rho, prevRho)/(1-max(rho, prevRho)) <= gsTol*scale {
				return nil
			}
			prevRho = rho
		}
		prev = change
	}
	return fmt.Errorf("exact: Gauss-Seidel evaluation did not reach %g in %d sweeps", gsTol, gsMaxSweeps)
}

// gsTol is the relative error Gauss-Seidel evaluation aims for.
const gsTol = 1e-12

const epsilon = 0x1p-52

// neverTerminates returns a non-terminal state from which no terminal state
// is reachable through positive-probability transitions, if there is one.
// For a substochastic chain that is exactly when I - P is singular.
func neverTerminates(p *MDP, next [][]Transition) (int, bool) {
	n := p.N()
	rev := make([][]int, n)
	for x := range n {
		if p.IsTerminal(x) {
			continue
		}
		for _, t := range next[x] {
			if t.P > 0 {
				rev[t.To] = append(rev[t.To], x)
			}
		}
	}
	reach := make([]bool, n)
	var queue []int
	for x := range n {
		if p.IsTerminal(x) {
			reach[x] = true
			queue = append(queue, x)
		}
	}
	for len(queue) > 0 {
		y := queue[0]
		queue = queue[1:]
		for _, x := range rev[y] {
			if !reach[x] {
				reach[x] = true
				queue = append(queue, x)
			}
		}
	}
	for x := range n {
		if !reach[x] {
			return x, true
		}
	}
	return 0, false
}
