package assign

import (
	"fmt"
	"testing"

	"baton/sim/exact"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// Rollout improves on the assignment policy as on any base policy
// (Bertsekas, "Multiagent rollout algorithms and reinforcement learning",
// arXiv:1910.00120: the cost improvement property): on exact tiny
// instances, one-at-a-time rollout with the assignment policy as its base
// costs no more than the assignment policy at any state, and the
// assignment policy itself is a valid policy (exactly evaluated).
func TestRolloutOnAssignmentImproves(t *testing.T) {
	for _, sc := range []struct {
		name string
		tiny func(uint64) model.Model
	}{
		{"harbor", func(s uint64) model.Model { return harbor.RandomTiny(s) }},
		{"upkeep", func(s uint64) model.Model { return upkeep.RandomTiny(s) }},
	} {
		for seed := uint64(1); seed <= 10; seed++ {
			t.Run(fmt.Sprintf("%s/seed=%d", sc.name, seed), func(t *testing.T) {
				m := sc.tiny(seed)
				a, err := Wrap(m)
				if err != nil {
					t.Fatal(err)
				}
				if err := exact.RolloutOnBaseNoWorse(a, seed, 20000); err != nil {
					t.Fatal(err)
				}
			})
		}
	}
}

func TestWrapUnknownScenario(t *testing.T) {
	if _, err := Wrap(fakeModel{}); err == nil {
		t.Fatal("wrapped a scenario without targets")
	}
}

type fakeModel struct{ model.Model }

func (fakeModel) Name() string { return "orchard" }

// The wrapped model's BaseAll (one solve for the fleet) is its Base robot
// by robot, and not the scenario's own BaseAll its embedding would promote.
func TestBaseAllIsBase(t *testing.T) {
	for _, sc := range []struct {
		name string
		m    model.Model
	}{
		{"harbor", must(harbor.Default(5))},
		{"upkeep", must(upkeep.Default(4))},
	} {
		a, err := Wrap(sc.m)
		if err != nil {
			t.Fatal(err)
		}
		rng := model.NewRNG(2)
		s := a.NewState()
		a.Start(s, rng.Rand)
		u, own := make([]int, a.Robots()), make([]int, a.Robots())
		differs := false
		for step := 0; step < 40 && !a.Terminal(s); step++ {
			a.(model.JointBaser).BaseAll(s, u)
			sc.m.(model.JointBaser).BaseAll(s, own)
			for r := range u {
				if b := a.Base(s, r); u[r] != b {
					t.Fatalf("%s step %d robot %d: BaseAll %d, Base %d", sc.name, step, r, u[r], b)
				}
				differs = differs || u[r] != own[r]
			}
			a.Step(s, u, rng.Rand)
		}
		if !differs {
			t.Fatalf("%s: the assignment never differed from the scenario's base policy", sc.name)
		}
	}
}

func must[T any](v T, err error) T {
	if err != nil {
		panic(err)
	}
	return v
}
