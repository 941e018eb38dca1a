package cli

import (
	"bufio"
	"context"
	"encoding/json"
	"os"
	"os/exec"
	"slices"
	"strings"
	"testing"
	"time"

	"baton/agentd/decide"
	"baton/agentd/turn"
	"baton/coordinator/clock"
	"baton/signal/learn"
	"baton/sim/episode"
	"baton/sim/fleetsum"
	"baton/sim/harbor"
	"baton/sim/world"
)

func testFleet(t *testing.T, o fleetOpts) *fleetRun {
	t.Helper()
	if o.fleet == "" {
		o.fleet = "test"
	}
	o.prefix, o.exe, o.logDir = "baton", simBin, t.TempDir()
	if o.slow == nil {
		o.slow = faults{}
	}
	if o.turnTime == 0 {
		o.turnTime = defaultTurnTime
	}
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	f, err := startFleet(ctx, o)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		f.close()
		if t.Failed() {
			for _, name := range []string{"coordinator", "agentd-0", "agentd-1"} {
				b, _ := os.ReadFile(o.logDir + "/" + name + ".log")
				t.Logf("%s log:\n%s", name, b)
			}
		}
	})
	return f
}

// opts is a fleet of robots on scenario with the coordinator's defaults,
// 4 samples and a horizon of 6, adjusted by with.
func opts(scenario string, robots, rounds int, seed uint64, with func(*clock.Config)) fleetOpts {
	c := clock.DefaultConfig()
	c.Rounds, c.Decide = rounds, decide.Config{Samples: 4, Horizon: 6}
	if with != nil {
		with(&c)
	}
	return fleetOpts{sc: scenarioFlags{name: scenario, robots: robots}, clock: c, seed: seed}
}

// record waits for round r's line in the coordinator's decision log (it is
// written once the robots' reports for r are in).
func record(t *testing.T, f *fleetRun, r int) clock.Record {
	t.Helper()
	deadline := time.Now().Add(15 * time.Second)
	for time.Now().Before(deadline) {
		if file, err := os.Open(f.decisionLog()); err == nil {
			sc := bufio.NewScanner(file)
			sc.Buffer(nil, 1<<24)
			for sc.Scan() {
				var rec clock.Record
				if json.Unmarshal(sc.Bytes(), &rec) == nil && rec.Round == uint64(r) {
					file.Close()
					return rec
				}
			}
			file.Close()
		}
		time.Sleep(20 * time.Millisecond)
	}
	t.Fatalf("round %d never reached the decision log", r)
	return clock.Record{}
}

// With no faults, a fleet of separate agentd processes over a real NATS
// server decides exactly what the in-process one-at-a-time rollout decides
// with the same seed, round by round, and the coordinator's relayed state
// is the world's state bit for bit.
func TestFleetMatchesInProcess(t *testing.T) {
	for _, sc := range []struct {
		name   string
		robots int
	}{{"harbor", 4}, {"upkeep", 3}} {
		t.Run(sc.name, func(t *testing.T) {
			const rounds, seed, samples, horizon = 12, 5, 6, 8
			f := testFleet(t, opts(sc.name, sc.robots, rounds, seed, func(c *clock.Config) {
				c.Mode, c.TurnBudget, c.Decide = turn.Sequential, time.Second, decide.Config{Samples: samples, Horizon: horizon}
			}))
			m := f.m
			ep := episode.Seed(seed, 0)
			ref := world.New(m, ep)
			d := decide.New(m, decide.Config{Samples: samples, Horizon: horizon})
			want := make([]int, m.Robots())
			for r := 1; r <= rounds; r++ {
				wantInts, wantReals := m.Flatten(ref.Y, nil, nil)
				d.OneAtATime(ref.Y, nil, episode.FleetSeed(ep), r, want)
				got := f.play(r)
				if !slices.Equal(got.Decided, want) {
					t.Fatalf("round %d: fleet decided %v, in-process %v", r, got.Decided, want)
				}
				if got.Guessed != 0 || got.Held != 0 {
					t.Fatalf("round %d: %d guessed, %d held with no faults", r, got.Guessed, got.Held)
				}
				rec := record(t, f, r)
				if !slices.Equal(rec.Snapshot.Ints, wantInts) || !slices.Equal(rec.Snapshot.Reals, wantReals) {
					t.Fatalf("round %d: coordinator decided on a different state than the world's", r)
				}
				ref.Apply(want)
			}
		})
	}
}

// A robot whose decisions are held back (delay injected in its own message
// layer) is guessed by its successors at their deadlines; the round closes
// by the last deadline, and the log says who was guessed.
func TestFleetSlowRobotIsGuessed(t *testing.T) {
	const budget = 150 * time.Millisecond
	o := opts("harbor", 4, 4, 2, func(c *clock.Config) { c.TurnBudget = budget })
	o.slow = faults{1: 2 * time.Second}
	f := testFleet(t, o)
	for r := 1; r <= 3; r++ {
		res := f.play(r)
		rec := record(t, f, r)
		if !slices.Equal(rec.Held, []int{1}) {
			t.Fatalf("round %d: held %v, want [1]", r, rec.Held)
		}
		for _, d := range rec.Decisions {
			switch d.Robot {
			case 0:
				if len(d.Guessed) != 0 {
					t.Errorf("round %d: robot 0 has no predecessor to guess, guessed %v", r, d.Guessed)
				}
			case 2, 3:
				if !slices.Contains(d.Guessed, 1) {
					t.Errorf("round %d: robot %d did not guess robot 1: heard %v guessed %v", r, d.Robot, d.Heard, d.Guessed)
				}
				// It waited for robot 1's deadline (turn 1 is due at 2 budgets).
				if d.AfterUs < uint64(2*budget/time.Microsecond) {
					t.Errorf("round %d: robot %d decided after %dus, before robot 1's deadline", r, d.Robot, d.AfterUs)
				}
			}
		}
		// Sum of the four turns' deadlines, plus scheduling slack.
		if limit := 4*budget + 100*time.Millisecond; time.Duration(rec.LatencyUs)*time.Microsecond > limit {
			t.Errorf("round %d took %dus, over %s", r, rec.LatencyUs, limit)
		}
		if res.Held != 1 || res.Guessed < 2 {
			t.Errorf("round %d: the world saw %d held and %d guessing", r, res.Held, res.Guessed)
		}
	}
}

// Killing an agentd takes it out of the order within a bounded number of
// rounds, after which no round waits for it; restarting brings it back.
func TestFleetMembership(t *testing.T) {
	const budget = 150 * time.Millisecond
	f := testFleet(t, opts("harbor", 4, 200, 3, func(c *clock.Config) { c.TurnBudget = budget }))
	round := 0
	next := func() (fleetsum.Round, clock.Record) {
		round++
		res := f.play(round)
		return res, record(t, f, round)
	}
	for range 2 {
		if _, rec := next(); len(rec.Order) != 4 {
			t.Fatalf("order %v before the kill", rec.Order)
		}
	}
	f.kill(2)
	killedAt := round
	for {
		_, rec := next()
		if !slices.Contains(rec.Order, 2) {
			break
		}
		if round-killedAt > 40 {
			t.Fatalf("robot 2 still in the order %d rounds after it was killed", round-killedAt)
		}
	}
	t.Logf("killed robot left the order after %d rounds", round-killedAt)
	for range 3 {
		_, rec := next()
		for _, d := range rec.Decisions {
			if slices.Contains(d.Guessed, 2) {
				t.Fatalf("round %d: robot %d still guesses the dead robot", round, d.Robot)
			}
		}
		if time.Duration(rec.LatencyUs)*time.Microsecond > budget {
			t.Fatalf("round %d took %dus: something waited for the dead robot", round, rec.LatencyUs)
		}
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	if err := f.restart(ctx, 2); err != nil {
		t.Fatal(err)
	}
	back := round
	for {
		_, rec := next()
		if slices.Contains(rec.Order, 2) && !slices.Contains(rec.Held, 2) {
			break
		}
		if round-back > 40 {
			t.Fatalf("restarted robot 2 not back in the order after %d rounds", round-back)
		}
	}
	t.Logf("restarted robot rejoined after %d rounds", round-back)
}

func TestUnreachableNATS(t *testing.T) {
	cmd := exec.Command(simBin, "agentd", "--robot", "0", "--nats", "nats://127.0.0.1:1", "--connect-timeout", "1500ms", "--http", "127.0.0.1:0")
	out, err := cmd.CombinedOutput()
	ee, ok := err.(*exec.ExitError)
	if !ok || ee.ExitCode() != 1 {
		t.Fatalf("want exit 1, got %v\n%s", err, out)
	}
	s := string(out)
	if !strings.Contains(s, "cannot reach NATS; retrying in 1s") || !strings.Contains(s, "cannot reach NATS at nats://127.0.0.1:1 after") || strings.Contains(s, "panic") {
		t.Fatalf("want a retry and a clear error:\n%s", s)
	}
}

// Learned guesses over the wire: the coordinator distributes a trained model
// through JetStream, every robot fetches it by version, and in parallel mode
// each robot's decision is exactly the in-process rollout turn with learned
// guesses for all its predecessors.
func TestFleetLearnedGuesses(t *testing.T) {
	m, err := harbor.Default(3)
	if err != nil {
		t.Fatal(err)
	}
	data, err := learn.Collect(m, decide.Config{Samples: 4, Horizon: 6}, 6, 11, nil)
	if err != nil {
		t.Fatal(err)
	}
	feat, _ := learn.FeaturizerFor(m)
	net, _ := learn.Train(feat, data, learn.TrainConfig{Seed: 3, Epochs: 10})
	file := t.TempDir() + "/guess.gm"
	if err := net.Save(file, 1); err != nil {
		t.Fatal(err)
	}
	loaded, _, err := learn.Load(file, m)
	if err != nil {
		t.Fatal(err)
	}
	const rounds, seed, samples, horizon = 12, 8, 4, 6
	o := opts("harbor", 3, rounds, seed, func(c *clock.Config) {
		c.Mode, c.TurnBudget, c.Guess, c.Decide = turn.Parallel, time.Second, "learned", decide.Config{Samples: samples, Horizon: horizon}
	})
	o.guessModel = file
	f := testFleet(t, o)
	ep := episode.Seed(seed, 0)
	ref := world.New(f.m, ep)
	d := decide.New(f.m, decide.Config{Samples: samples, Horizon: horizon})
	want := make([]int, 3)
	differ := 0
	// The first round start names the model; robots fetch it while the
	// round runs, so decisions match from the round after they have it.
	for r := 1; r <= rounds; r++ {
		known := make([]int, 3)
		for k := range 3 {
			for j := range known {
				known[j] = -1
			}
			for i := range k { // every predecessor guessed by the model, in order
				prior := slices.Clone(known) // robots 0..i-1 guessed, the rest -1
				known[i] = loaded.PredictGiven(ref.Y, i, i, prior)
			}
			want[k], _ = d.Turn(ref.Y, k, known, decide.TurnSeed(episode.FleetSeed(ep), r, k))
		}
		// The same with base guesses, to know the model's guesses mattered.
		base := make([]int, 3)
		for k := range 3 {
			for j := range known {
				known[j] = -1
			}
			base[k], _ = d.Turn(ref.Y, k, known, decide.TurnSeed(episode.FleetSeed(ep), r, k))
		}
		if r >= 3 && !slices.Equal(base, want) {
			differ++
		}
		got := f.play(r)
		if r >= 3 && !slices.Equal(got.Decided, want) {
			t.Fatalf("round %d: fleet %v, in-process with learned guesses %v", r, got.Decided, want)
		}
		ref.Apply(got.Controls())
	}
	t.Logf("learned guesses changed the joint decision in %d of the %d rounds checked", differ, rounds-2)
	if differ == 0 {
		t.Fatal("the model's guesses never differed from base guesses: the check proves nothing")
	}
	for r := range 3 {
		b, _ := os.ReadFile(f.o.logDir + "/agentd-" + string(rune('0'+r)) + ".log")
		if !strings.Contains(string(b), "guess model loaded") {
			t.Errorf("agentd %d never loaded the model:\n%s", r, b)
		}
	}
}
