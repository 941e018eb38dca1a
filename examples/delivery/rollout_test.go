package delivery_test

import (
	"fmt"
	"slices"
	"strings"
	"testing"
	"time"

	"baton/agentd/decide"
	"baton/agentd/turn"
	"baton/coordinator/clock"
	"baton/sim/compare"
	"baton/sim/episode"
	"baton/sim/model"
	"baton/sim/scenarios"
	"baton/sim/vfleet"
	"baton/sim/world"

	"example.com/delivery"
)

// Importing the package registers it: Baton's own registry lists it,
// builds the built-in instance and reads files through it.
func TestRegistered(t *testing.T) {
	if !slices.Contains(scenarios.Names(), "delivery") || !strings.Contains(scenarios.Help(), "parcels between stations") {
		t.Fatalf("not registered: %v", scenarios.Names())
	}
	m, err := scenarios.Load("delivery", "", 4)
	if err != nil || m.Robots() != 4 || m.Name() != "delivery" {
		t.Fatalf("built-in: %v %v", m, err)
	}
	if m, err = scenarios.Load("delivery", "depot.yaml", 0); err != nil || m.Robots() != 3 {
		t.Fatalf("depot.yaml: %v", err)
	}
	if _, ok := m.(model.Fleet); !ok {
		t.Error("not a model.Fleet: it could not run as a fleet")
	}
	if _, ok := m.(model.Drawer); !ok {
		t.Error("not a model.Drawer: the fleet view could not draw it")
	}
}

// Multiagent rollout on top of the greedy base: on the same seeded
// episodes (same arrivals for every policy) one-at-a-time rollout costs
// less than the base policy it improves on. The cost-improvement property
// holds for exact Q-factors; with 16 Monte Carlo samples it is checked on
// the mean, with the per-episode wins logged.
func TestRolloutBeatsBase(t *testing.T) {
	m, err := delivery.Default(3)
	if err != nil {
		t.Fatal(err)
	}
	const episodes = 8
	rep, err := compare.Run(m, compare.Options{Episodes: episodes, Seed: 7, Decide: decide.DefaultConfig(),
		Policies: []string{compare.Base, compare.OneAtTime}})
	if err != nil {
		t.Fatal(err)
	}
	base, roll := rep.Row(compare.Base), rep.Row(compare.OneAtTime)
	wins := 0
	for i := range episodes {
		if roll.Costs[i] <= base.Costs[i] {
			wins++
		}
	}
	t.Logf("mean cost: base %.1f ± %.1f, one-at-a-time %.1f ± %.1f; rollout no worse in %d of %d episodes",
		base.MeanCost, base.CI95, roll.MeanCost, roll.CI95, wins, episodes)
	if roll.MeanCost >= base.MeanCost || wins < episodes/2 {
		t.Errorf("rollout %.1f does not improve on base %.1f (%d of %d episodes no worse)", roll.MeanCost, base.MeanCost, wins, episodes)
	}
}

// At the start every robot waits at the hub: the base policy sends all of
// them after the same nearest parcel; rollout, deciding one robot at a
// time knowing the choices before it, does not.
func TestRolloutSpreadsTheRobots(t *testing.T) {
	m, err := delivery.Default(3)
	if err != nil {
		t.Fatal(err)
	}
	x := m.NewState()
	m.Start(x, nil)
	base := make([]int, 3)
	model.BaseJoint(m, x, base)
	if base[0] != base[1] || base[1] != base[2] {
		t.Fatalf("base at the start %v: expected the robots to herd", base)
	}
	d := decide.New(m, decide.DefaultConfig())
	u := make([]int, 3)
	d.OneAtATime(x, nil, 1, 1, u)
	t.Logf("base %v, rollout %v", base, u)
	if u[0] == u[1] && u[1] == u[2] {
		t.Errorf("rollout %v herds like the base policy", u)
	}
}

// A whole fleet in one process in virtual time (Baton's sim/vfleet: the
// robots' and the coordinator's real protocol machines and wire messages)
// decides exactly what the in-process rollout decides: the model.Fleet
// round trip holds inside the runtime, round after round.
func TestVirtualFleetMatchesRollout(t *testing.T) {
	for _, mode := range []turn.Mode{turn.Sequential, turn.Hybrid} {
		t.Run(fmt.Sprint(mode), func(t *testing.T) {
			m, err := delivery.Default(4)
			if err != nil {
				t.Fatal(err)
			}
			c := clock.DefaultConfig()
			c.Fleet, c.Epoch, c.Model, c.Digest, c.Mode = "virtual", 1, m, "d", mode
			c.Decide = decide.Config{Samples: 4, Horizon: 6}
			ep := episode.Seed(5, 0)
			c.Seed = episode.FleetSeed(ep)
			cfg := vfleet.Config{Clock: c, World: ep, Link: vfleet.Link{Hop: 200 * time.Microsecond, Seed: 5}, TurnTime: 2 * time.Millisecond}
			f, err := vfleet.New(cfg)
			if err != nil {
				t.Fatal(err)
			}
			got, err := f.Run(20, nil)
			if err != nil {
				t.Fatal(err)
			}
			ref := world.New(m, ep)
			dec := decide.New(m, c.Decide)
			want := make([]int, m.Robots())
			for _, r := range got {
				dec.OneAtATime(ref.Y, c.Order, c.Seed, r.Round, want)
				if !slices.Equal(r.Decided, want) || r.Held != 0 || r.Guessed != 0 {
					t.Fatalf("round %d: the fleet decided %v (%d held, %d guessed), in-process rollout %v", r.Round, r.Decided, r.Held, r.Guessed, want)
				}
				ref.Apply(want)
			}
			if len(got) != 20 || f.World().Cost != ref.Cost {
				t.Fatalf("%d rounds, world cost %g, reference %g", len(got), f.World().Cost, ref.Cost)
			}
		})
	}
}
