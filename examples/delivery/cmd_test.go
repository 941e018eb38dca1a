package delivery_test

import (
	"bufio"
	"bytes"
	"encoding/json"
	"errors"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"baton/agentd/decide"
	"baton/coordinator/clock"
	"baton/coordinator/view"
	"baton/sim/episode"
	"baton/sim/world"

	"example.com/delivery"
)

// The integrator's own binaries (cmd/agentd, cmd/coordinator, cmd/sim),
// built once for every test here with the go command that runs the tests.
var (
	buildOnce sync.Once
	binDir    string
	buildErr  error
)

func binary(t *testing.T, name string) string {
	t.Helper()
	buildOnce.Do(func() {
		binDir, buildErr = os.MkdirTemp("", "delivery-bin-")
		if buildErr != nil {
			return
		}
		cmd := exec.Command("go", "build", "-o", binDir+string(os.PathSeparator), "./cmd/...")
		if out, err := cmd.CombinedOutput(); err != nil {
			buildErr = errors.New("go build ./cmd/...: " + err.Error() + "\n" + string(out))
		}
	})
	if buildErr != nil {
		t.Fatal(buildErr)
	}
	return filepath.Join(binDir, name)
}

func TestMain(m *testing.M) {
	code := m.Run()
	if binDir != "" {
		os.RemoveAll(binDir)
	}
	os.Exit(code)
}

// run runs a binary with args and returns its exit code and output.
func run(t *testing.T, bin string, args ...string) (int, string) {
	t.Helper()
	cmd := exec.Command(bin, args...)
	var out bytes.Buffer
	cmd.Stdout, cmd.Stderr = &out, &out
	done := make(chan error, 1)
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	go func() { done <- cmd.Wait() }()
	select {
	case err := <-done:
		var ee *exec.ExitError
		if err != nil && !errors.As(err, &ee) {
			t.Fatal(err)
		}
		return cmd.ProcessState.ExitCode(), out.String()
	case <-time.After(2 * time.Minute):
		_ = cmd.Process.Kill()
		<-done
		t.Fatalf("%s %v did not finish in 2 minutes:\n%s", filepath.Base(bin), args, out.String())
		return 0, ""
	}
}

// Both daemons start (help), know the scenario, and refuse bad flags and
// bad scenario files naming the flag or the file's line, before they touch
// the network.
func TestDaemons(t *testing.T) {
	bad := filepath.Join(t.TempDir(), "bad.yaml")
	if err := os.WriteFile(bad, []byte("stations:\n  - {name: a, x: 0, y: 0}\n  - {name: b, x: 1, y: 0}\nroads: [[a, b]]\ncapacity: -2\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	badLine := bad + ":5: capacity: must be between 1 and 1024 parcel slots, got -2"
	cases := []struct {
		bin  string
		args []string
		code int
		want string
	}{
		{"agentd", []string{"-h"}, 0, "scenario: delivery or harbor or upkeep"},
		{"coordinator", []string{"-h"}, 0, "scenario: delivery or harbor or upkeep"},
		{"agentd", []string{"--bogus"}, 2, "flag provided but not defined: -bogus"},
		{"agentd", []string{"--robots", "0"}, 2, `invalid value "0" for flag -robots: want a fleet size from 1 to 1024`},
		{"agentd", []string{"--scenario", "delivery"}, 2, "agentd: --robot N is required"},
		{"agentd", []string{"--robot", "0", "--scenario", "delivery", "--config", bad, "--nats", "nats://127.0.0.1:1"}, 1, "agentd: " + badLine},
		{"agentd", []string{"--robot", "0", "--scenario", "parcels"}, 1, `agentd: unknown scenario "parcels" (known: delivery, harbor, upkeep)`},
		{"coordinator", []string{"--scenario", "delivery", "--config", bad}, 1, "coordinator: " + badLine},
		{"coordinator", []string{"--scenario", "delivery", "--samples", "0"}, 1, "coordinator: --samples 0: want 1..4096"},
		{"coordinator", []string{"--scenario", "delivery", "--mode", "fast"}, 2, `invalid value "fast" for flag -mode`},
		{"coordinator", []string{"--scenario", "delivery", "stray"}, 2, `coordinator: unexpected argument "stray"`},
	}
	for _, c := range cases {
		code, out := run(t, binary(t, c.bin), c.args...)
		if code != c.code || !strings.Contains(out, c.want) {
			t.Errorf("%s %s: exit %d, want %d with %q; output:\n%s", c.bin, strings.Join(c.args, " "), code, c.code, c.want, firstLines(out, 6))
		}
	}
}

func firstLines(s string, n int) string {
	lines := strings.SplitN(s, "\n", n+1)
	return strings.Join(lines[:min(n, len(lines))], "\n")
}

// The integrator's sim runs a whole fleet of its own processes (an
// embedded NATS server, the coordinator and one agentd per robot, all
// re-runs of the same binary) on the delivery scenario; every round is
// decided by every robot, and the decisions are bit for bit what the
// in-process one-at-a-time rollout decides on the world the simulator
// plays (episode 0 of the run seed, as sim compare).
func TestSimFleet(t *testing.T) {
	logs := t.TempDir()
	code, out := run(t, binary(t, "sim"), "fleet", "--scenario", "delivery", "--rounds", "20", "--robots", "3", "--json",
		"--logs", logs, "--turn-deadline", "1s")
	if code != 0 {
		t.Fatalf("sim fleet: exit %d\n%s", code, out)
	}
	var sum struct {
		Scenario string  `json:"scenario"`
		Robots   int     `json:"robots"`
		Rounds   int     `json:"rounds"`
		Held     int     `json:"robot_rounds_held"`
		Cost     float64 `json:"cost"`
		Wall     float64 `json:"wall_seconds"`
		P50      float64 `json:"round_latency_p50_ms"`
		Log      string  `json:"decision_log"`
	}
	if err := json.Unmarshal([]byte(out[strings.Index(out, "{"):]), &sum); err != nil {
		t.Fatalf("summary: %v\n%s", err, out)
	}
	t.Logf("%d rounds in %.2f s, p50 %.2f ms per round, cost %g", sum.Rounds, sum.Wall, sum.P50, sum.Cost)
	if sum.Scenario != "delivery" || sum.Robots != 3 || sum.Rounds != 20 || sum.Held != 0 {
		t.Fatalf("summary %+v", sum)
	}

	// The decision log, round by round, against the in-process rollout.
	m, err := delivery.Default(3)
	if err != nil {
		t.Fatal(err)
	}
	ep := episode.Seed(1, 0) // sim fleet's default --seed 1
	ref := world.New(m, ep)
	dec := decide.New(m, decide.DefaultConfig())
	want := make([]int, 3)
	f, err := os.Open(sum.Log)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	sc.Buffer(nil, 1<<20)
	rounds := 0
	for sc.Scan() {
		var rec clock.Record
		if err := json.Unmarshal(sc.Bytes(), &rec); err != nil {
			t.Fatal(err)
		}
		rounds++
		if rec.Round != uint64(rounds) || len(rec.Held) != 0 || len(rec.Decisions) != 3 || rec.Snapshot == nil {
			t.Fatalf("round %d (line %d): %d decisions, held %v", rec.Round, rounds, len(rec.Decisions), rec.Held)
		}
		// The fleet view draws every round (model.Drawer on the logged state).
		if fr, err := view.FrameOf(m, rec); err != nil || len(fr.Robots) != 3 {
			t.Fatalf("round %d: the view cannot draw it: %v", rec.Round, err)
		}
		if flat, _ := m.Flatten(ref.Y, nil, nil); !slices.Equal(flat, rec.Snapshot.Ints) {
			t.Fatalf("round %d: the coordinator's state %v, the world's %v", rec.Round, rec.Snapshot.Ints, flat)
		}
		dec.OneAtATime(ref.Y, nil, episode.FleetSeed(ep), int(rec.Round), want)
		if !slices.Equal(rec.Controls, want) {
			t.Fatalf("round %d: the fleet decided %v, in-process rollout %v", rec.Round, rec.Controls, want)
		}
		ref.Apply(want)
	}
	if err := sc.Err(); err != nil {
		t.Fatal(err)
	}
	if rounds != 20 || ref.Cost != sum.Cost {
		t.Fatalf("%d rounds logged, cost %g, in-process %g", rounds, sum.Cost, ref.Cost)
	}
}
