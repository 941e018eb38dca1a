package decide

import "baton/sim/model"

// Policy picks a joint control for a state in a round.
type Policy interface {
	Name() string
	Decide(x model.State, round int, out []int) (Stats, error)
}

// Base is the base policy as a Policy.
type Base struct{ M model.Model }

func (Base) Name() string { return "base" }

func (b Base) Decide(x model.State, _ int, out []int) (Stats, error) {
	model.BaseJoint(b.M, x, out)
	return Stats{}, nil
}

// OneAtATimePolicy is multiagent rollout with a fixed order (nil: 0..m-1).
type OneAtATimePolicy struct {
	D     *Decider
	Order []int
	Seed  uint64
}

func (OneAtATimePolicy) Name() string { return "one-at-a-time" }

func (p OneAtATimePolicy) Decide(x model.State, round int, out []int) (Stats, error) {
	return p.D.OneAtATime(x, p.Order, p.Seed, round, out), nil
}

// AllAtOncePolicy is rollout over all joint controls.
type AllAtOncePolicy struct {
	D    *Decider
	Seed uint64
}

func (AllAtOncePolicy) Name() string { return "all-at-once" }

func (p AllAtOncePolicy) Decide(x model.State, round int, out []int) (Stats, error) {
	return p.D.AllAtOnce(x, p.Seed, round, out)
}
