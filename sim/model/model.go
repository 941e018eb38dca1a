// Package model is the contract between scenarios and the decision code.
//
// Rollout, the exact tools, the simulator and the fleet runtime only ever see
// these interfaces, so the same search runs on every scenario. A State is
// opaque; scenarios use a pointer type so passing it through an interface
// never allocates, and all hot-path methods (Step, Base, NumControls,
// CopyState) must not allocate either.
package model

import "math/rand/v2"

// State is a scenario's state (for partially observed scenarios: the belief
// state). Always a pointer to the scenario's own struct.
type State any

// Model is one configured scenario instance.
type Model interface {
	// Name is the scenario's name, e.g. "harbor".
	Name() string
	// Robots is the number of robots m.
	Robots() int
	// MaxControls bounds NumControls over all states and robots.
	MaxControls() int

	// NewState allocates a zeroed state; use it to make scratch buffers.
	NewState() State
	// CopyState copies src into dst (both from NewState of this model).
	CopyState(dst, src State)
	// Start writes a start state into dst. Scenarios with a fixed start
	// ignore rng; those with random starts draw from it.
	Start(dst State, rng *rand.Rand)

	// NumControls is the number of controls of robot r in s; controls are
	// 0..n-1 and control 0 always means "stay where you are" (hold, or
	// service the current site).
	NumControls(s State, r int) int
	// Step applies joint control u to s in place, drawing the disturbance
	// from rng, and returns the stage cost g(x,u,w). On a terminal state it
	// returns 0 and leaves s unchanged.
	Step(s State, u []int, rng *rand.Rand) float64
	// Terminal reports an absorbing, cost-free state (e.g. all slicks collected).
	Terminal(s State) bool
	// Discount is the discount factor a in (0,1]; 1 means undiscounted.
	Discount() float64
	// Horizon is the maximum number of steps of an episode.
	Horizon() int

	// Base is the base policy's control for robot r in state s. It looks only
	// at s, so any robot can evaluate it for any other robot.
	Base(s State, r int) int
}

// TerminalCoster is implemented by models that can estimate the cost-to-go
// of a state; rollout adds it (discounted) where it truncates a simulation.
type TerminalCoster interface {
	TerminalCost(s State) float64
}

// ControlNamer gives controls human-readable names for logs and tables.
type ControlNamer interface {
	ControlName(s State, r, c int) string
}

// Enumerable is implemented by models whose instances can be solved exactly
// (sim/exact): a canonical key per state and the full outcome distribution
// of a step.
type Enumerable interface {
	Model
	// Key is a canonical encoding of s: equal keys mean equal states
	// (scenarios may merge symmetric states, e.g. indistinguishable slicks).
	Key(s State) string
	// Outcomes calls fn once per possible next state of s under u, with its
	// probability (summing to 1) and the stage cost. next is only valid
	// during the call. On a terminal state it is not called.
	Outcomes(s State, u []int, fn func(next State, p, cost float64))
}

// JointBaser is implemented by models whose base policy decides for the
// whole fleet at once (an assignment, an auction): BaseAll fills u with
// every robot's base control in s, equal to Base(s, r) for each r, at the
// cost of one solve rather than one per robot. Harbor and upkeep have one;
// a wrapper that embeds a scenario's concrete model to replace Base must
// replace BaseAll as well (or embed the Model interface, which promotes
// only Model's methods), or BaseJoint would take the scenario's own.
type JointBaser interface {
	BaseAll(s State, u []int)
}

// Aliaser is implemented by models where distinct controls can act alike:
// Alias(s, r, c) is the lowest control of robot r in s whose effect equals
// c's, so that for every disturbance the next state and stage cost are the
// same (a move blocked by the map's edge is a hold). Rollout then simulates
// one of them and gives the others its estimate: exact under common random
// numbers. Alias(s, r, c) <= c, and c itself when nothing lower acts alike.
type Aliaser interface {
	Alias(s State, r, c int) int
}

// BaseJoint fills u with the base policy's controls for every robot in s.
func BaseJoint(m Model, s State, u []int) {
	if jb, ok := m.(JointBaser); ok {
		jb.BaseAll(s, u)
		return
	}
	for r := range u {
		u[r] = m.Base(s, r)
	}
}

// MaxRobots bounds a fleet's size (the round protocol's bound too).
const MaxRobots = 1024
