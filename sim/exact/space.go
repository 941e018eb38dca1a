package exact

import (
	"fmt"
	"math"

	"baton/sim/model"
)

// maxJoint bounds the joint controls of one state; beyond it the
// all-at-once search (and the enumeration itself) stops being "tiny".
const maxJoint = 1 << 20

// Space is the reachable state space of an Enumerable model, enumerated as
// an MDP whose action j in state x is the joint control with mixed-radix
// index j (robot 0 the most significant digit).
type Space struct {
	Model model.Enumerable
	// MDP has one action per joint control at every non-terminal state.
	MDP *MDP
	// States holds one representative per key; States[0] is the start.
	States []model.State
	// Keys[x] is Model.Key(States[x]).
	Keys []string

	index    map[string]int
	controls [][]int // controls[x][r] = NumControls(States[x], r); nil at terminal states
	base     Policy
}

// Policy is a joint-control index per state (see Space.Encode); entries at
// terminal states are ignored.
type Policy []int

// Len is the number of enumerated states.
func (sp *Space) Len() int { return len(sp.States) }

// Robots is the number of robots.
func (sp *Space) Robots() int { return sp.Model.Robots() }

// Index returns the state with the given key.
func (sp *Space) Index(key string) (int, bool) {
	x, ok := sp.index[key]
	return x, ok
}

// Terminal reports whether state x is terminal (no decision is made there).
func (sp *Space) Terminal(x int) bool { return sp.MDP.IsTerminal(x) }

// Controls is the number of controls of robot r in state x (0 at terminal states).
func (sp *Space) Controls(x, r int) int {
	if sp.controls[x] == nil {
		return 0
	}
	return sp.controls[x][r]
}

// NumJoint is the number of joint controls in state x (0 at terminal states).
func (sp *Space) NumJoint(x int) int { return len(sp.MDP.Actions[x]) }

// Encode returns the mixed-radix index of joint control u in state x.
func (sp *Space) Encode(x int, u []int) int {
	j := 0
	for r, c := range sp.controls[x] {
		j = j*c + u[r]
	}
	return j
}

// Decode writes the joint control with index j in state x into u.
func (sp *Space) Decode(x, j int, u []int) {
	nc := sp.controls[x]
	for r := len(nc) - 1; r >= 0; r-- {
		u[r] = j % nc[r]
		j /= nc[r]
	}
}

// Q is the exact Q-factor of joint control j in state x against J:
// sum_w p(w) [g(x,u,w) + a J(x')].
func (sp *Space) Q(x, j int, J []float64) float64 { return sp.MDP.Q(x, j, J) }

// Enumerate explores every state reachable from start under any joint
// control (breadth first, so state numbers are deterministic), merging
// states and outcomes with equal keys. It refuses instances with more than
// maxStates states, and checks each outcome distribution and the base
// policy's controls on the way.
func Enumerate(m model.Enumerable, start model.State, maxStates int) (*Space, error) {
	a := m.Discount()
	if !(a > 0 && a <= 1) {
		return nil, fmt.Errorf("exact: %s: discount %v not in (0,1]", m.Name(), a)
	}
	robots := m.Robots()
	sp := &Space{
		Model: m,
		MDP:   &MDP{Discount: a},
		index: map[string]int{},
	}
	add := func(s model.State) (int, error) {
		key := m.Key(s)
		if x, ok := sp.index[key]; ok {
			return x, nil
		}
		if len(sp.States) >= maxStates {
			return 0, fmt.Errorf("exact: %s: instance too large to enumerate: more than %d states (reached %d)", m.Name(), maxStates, len(sp.States)+1)
		}
		c := m.NewState()
		m.CopyState(c, s)
		x := len(sp.States)
		sp.States = append(sp.States, c)
		sp.Keys = append(sp.Keys, key)
		sp.index[key] = x
		return x, nil
	}
	if _, err := add(start); err != nil {
		return nil, err
	}

	u := make([]int, robots)
	slot := map[int]int{} // next state -> position in the current action's list
	var cbErr error
	for x := 0; x < len(sp.States); x++ {
		s := sp.States[x]
		if m.Terminal(s) {
			sp.MDP.Actions = append(sp.MDP.Actions, nil)
			sp.MDP.Terminal = append(sp.MDP.Terminal, true)
			sp.controls = append(sp.controls, nil)
			sp.base = append(sp.base, 0)
			continue
		}
		nc := make([]int, robots)
		joint := 1
		for r := range nc {
			nc[r] = m.NumControls(s, r)
			if nc[r] < 1 {
				return nil, fmt.Errorf("exact: %s: state %q: robot %d has %d controls", m.Name(), sp.Keys[x], r, nc[r])
			}
			joint *= nc[r]
			if joint > maxJoint {
				return nil, fmt.Errorf("exact: %s: state %q: more than %d joint controls", m.Name(), sp.Keys[x], maxJoint)
			}
		}
		sp.controls = append(sp.controls, nc)
		sp.MDP.Terminal = append(sp.MDP.Terminal, false)

		model.BaseJoint(m, s, u)
		for r, c := range u {
			if c < 0 || c >= nc[r] {
				return nil, fmt.Errorf("exact: %s: state %q: base control %d of robot %d out of range [0,%d)", m.Name(), sp.Keys[x], c, r, nc[r])
			}
		}
		sp.base = append(sp.base, sp.Encode(x, u))

		acts := make([]Action, joint)
		for j := range acts {
			sp.Decode(x, j, u)
			clear(slot)
			var act Action
			sum := 0.0
			m.Outcomes(s, u, func(next model.State, p, cost float64) {
				if cbErr != nil || p == 0 {
					return
				}
				if !(p > 0) || math.IsNaN(cost) || math.IsInf(cost, 0) {
					cbErr = fmt.Errorf("exact: %s: state %q control %v: outcome with probability %v and cost %v", m.Name(), sp.Keys[x], u, p, cost)
					return
				}
				y, err := add(next)
				if err != nil {
					cbErr = err
					return
				}
				sum += p
				act.Cost += p * cost
				if i, ok := slot[y]; ok {
					act.Next[i].P += p
				} else {
					slot[y] = len(act.Next)
					act.Next = append(act.Next, Transition{y, p})
				}
			})
			if cbErr != nil {
				return nil, cbErr
			}
			if math.Abs(sum-1) > probTol {
				return nil, fmt.Errorf("exact: %s: state %q control %v: outcome probabilities sum to %v", m.Name(), sp.Keys[x], u, sum)
			}
			acts[j] = act
		}
		sp.MDP.Actions = append(sp.MDP.Actions, acts)
	}
	return sp, nil
}
