package vfleet

import (
	"fmt"
	"math/rand/v2"
	"slices"
	"testing"
	"time"

	"baton/agentd/decide"
	"baton/agentd/turn"
	"baton/coordinator/clock"
	"baton/sim/episode"
	"baton/sim/fleetsum"
	"baton/sim/model"
	"baton/sim/scenarios"
	"baton/sim/world"
)

func fleetConfig(t testing.TB, scenario string, robots int, seed uint64) Config {
	t.Helper()
	m, err := scenarios.Load(scenario, "", robots)
	if err != nil {
		t.Fatal(err)
	}
	c := clock.DefaultConfig()
	c.Fleet, c.Epoch, c.Model, c.Digest = "virtual", 1, m.(model.Fleet), "d"
	c.Decide = decide.Config{Samples: 4, Horizon: 6}
	ep := episode.Seed(seed, 0)
	c.Seed = episode.FleetSeed(ep)
	return Config{Clock: c, World: ep, Link: Link{Hop: 200 * time.Microsecond, Seed: seed}, TurnTime: 2 * time.Millisecond}
}

// reference is the in-process one-at-a-time rollout on the world's own
// state, round by round, carrying out what the fleet carried out.
func checkAgainstReference(t *testing.T, cfg Config, got []fleetsum.Round) {
	t.Helper()
	m := cfg.Clock.Model
	ref := world.New(m, cfg.World)
	d := decide.New(m, cfg.Clock.Decide)
	want := make([]int, m.Robots())
	for _, r := range got {
		d.OneAtATime(ref.Y, cfg.Clock.Order, cfg.Clock.Seed, r.Round, want)
		if !slices.Equal(r.Decided, want) {
			t.Fatalf("round %d: the virtual fleet decided %v, in-process one-at-a-time %v", r.Round, r.Decided, want)
		}
		if r.Held != 0 || r.Guessed != 0 {
			t.Fatalf("round %d: %d held, %d guessed with no faults", r.Round, r.Held, r.Guessed)
		}
		ref.Apply(want)
	}
}

func TestMatchesInProcessRollout(t *testing.T) {
	for _, sc := range []struct {
		name   string
		robots int
	}{{"harbor", 4}, {"upkeep", 3}} {
		for _, mode := range []turn.Mode{turn.Sequential, turn.Hybrid} {
			t.Run(fmt.Sprint(sc.name, "/", mode), func(t *testing.T) {
				cfg := fleetConfig(t, sc.name, sc.robots, 5)
				cfg.Clock.Mode = mode
				f, err := New(cfg)
				if err != nil {
					t.Fatal(err)
				}
				got, err := f.Run(15, nil)
				if err != nil {
					t.Fatal(err)
				}
				checkAgainstReference(t, cfg, got)
			})
		}
	}
}

// Property: for random seeds, turn orders, delivery orders and delays that
// fit the deadlines, the decisions are the in-process rollout's.
func TestPropertyDeliveryOrderDoesNotMatter(t *testing.T) {
	rng := rand.New(rand.NewPCG(42, 0))
	cases := 12
	if testing.Short() {
		cases = 4
	}
	for i := range cases {
		seed := rng.Uint64N(1 << 32)
		robots := 2 + rng.IntN(4)
		sc := []string{"harbor", "upkeep"}[rng.IntN(2)]
		cfg := fleetConfig(t, sc, robots, seed)
		cfg.Clock.Mode = []turn.Mode{turn.Sequential, turn.Hybrid}[rng.IntN(2)]
		cfg.Clock.Order = clock.Order(rng.Perm(robots))
		// Turn budget 200 ms; one hop at most 30 ms, a turn 5 ms: every
		// decision arrives well before the deadline of the turn waiting
		// for it.
		cfg.Link = Link{Hop: time.Duration(rng.IntN(10)) * time.Millisecond, Jitter: time.Duration(1+rng.IntN(20)) * time.Millisecond,
			Seed: seed, Shuffle: true}
		cfg.TurnTime = time.Duration(rng.IntN(5)) * time.Millisecond
		t.Run(fmt.Sprintf("%d-%s-%d-%s", i, sc, robots, cfg.Clock.Mode), func(t *testing.T) {
			f, err := New(cfg)
			if err != nil {
				t.Fatal(err)
			}
			got, err := f.Run(6, nil)
			if err != nil {
				t.Fatal(err)
			}
			checkAgainstReference(t, cfg, got)
		})
	}
}

// The same seeds replay the same run, event for event.
func TestDeterministic(t *testing.T) {
	run := func() (string, time.Duration, int) {
		cfg := fleetConfig(t, "harbor", 4, 9)
		cfg.Clock.Mode = turn.Parallel
		cfg.Link = Link{Hop: time.Millisecond, Jitter: 3 * time.Millisecond, Loss: 0.1, Seed: 3, Shuffle: true}
		f, _ := New(cfg)
		got, err := f.Run(20, nil)
		if err != nil {
			t.Fatal(err)
		}
		var s fleetsum.Summary
		tl := fleetsum.NewTally()
		for _, r := range got {
			tl.Add(&s, r)
		}
		tl.Finish(&s)
		return s.DecisionsSHA256, f.Now(), f.Events()
	}
	a, at, ae := run()
	b, bt, be := run()
	if a != b || at != bt || ae != be {
		t.Fatalf("two runs differ: %s %s %d / %s %s %d", a, at, ae, b, bt, be)
	}
}
