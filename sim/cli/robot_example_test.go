package cli

import (
	"bytes"
	"context"
	"encoding/json"
	"io"
	"net/http"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"baton/agentd/node"
	"baton/coordinator/clock"
)

// The example robot program (examples/robot) drives one robot of a real
// process fleet through its agentd's local interface, while the test plays
// the world for the others: the example's decisions are the ones in the
// coordinator's decision log for its robot, what it says it carried out is
// what the log books, and the positions it reports are the ones the
// coordinator decides the next round on (and the world's own).
func TestRobotExample(t *testing.T) {
	bin := filepath.Join(t.TempDir(), "robot")
	if out, err := exec.Command("go", "build", "-o", bin, "baton/examples/robot").CombinedOutput(); err != nil {
		t.Fatalf("building examples/robot: %v\n%s", err, out)
	}
	for _, name := range []string{"harbor", "upkeep"} {
		t.Run(name, func(t *testing.T) {
			const robots, rounds, ex = 3, 5, 2 // robot 2 is the example's
			// The coordinator waits for the example's reports (a process
			// that starts while round 1 runs).
			f := testFleet(t, opts(name, robots, rounds, 4, func(c *clock.Config) { c.ReportWait = 10 * time.Second }))
			ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
			defer cancel()
			cmd := exec.CommandContext(ctx, bin, "--agentd", f.bases[ex], "--scenario", name,
				"--robots", strconv.Itoa(robots), "--robot", strconv.Itoa(ex), "--rounds", strconv.Itoa(rounds))
			var stdout, stderr bytes.Buffer
			cmd.Stdout, cmd.Stderr = &stdout, &stderr
			if err := cmd.Start(); err != nil {
				t.Fatal(err)
			}
			worldPos := playOthers(t, f, rounds, ex)
			if err := cmd.Wait(); err != nil {
				t.Fatalf("the example failed: %v\n%s%s", err, stdout.String(), stderr.String())
			}
			out := stdout.String()
			t.Logf("the example's output:\n%s", out)

			line := regexp.MustCompile(`(?m)^round (\d+): (.+) \(control (\d+)\) -> (?:cell|site) (\d+)`)
			got := line.FindAllStringSubmatch(out, -1)
			if len(got) != rounds || strings.Contains(out, "hold") || strings.Contains(out, "not taken") {
				t.Fatalf("want %d rounds acted on, no holds and no refused reports:\n%s", rounds, out)
			}
			for i, g := range got {
				r, _ := strconv.Atoi(g[1])
				action := g[2]
				control, _ := strconv.Atoi(g[3])
				pos, _ := strconv.Atoi(g[4])
				if r != i+1 {
					t.Fatalf("line %d is round %d: the example skipped a round\n%s", i+1, r, out)
				}
				rec := record(t, f, r)
				var logged *clock.Decision
				for j := range rec.Decisions {
					if rec.Decisions[j].Robot == ex {
						logged = &rec.Decisions[j]
					}
				}
				if logged == nil || logged.Control != control || rec.Controls[ex] != control {
					t.Fatalf("round %d: the example carried out %d (%s), the log has %+v, controls %v", r, control, action, logged, rec.Controls)
				}
				if rec.Reports != robots || len(rec.Missing) != 0 {
					t.Fatalf("round %d: %d reports, missing %v: the example did not report", r, rec.Reports, rec.Missing)
				}
				if len(rec.Applied) <= ex || rec.Applied[ex] != control {
					t.Fatalf("round %d: the log books %v carried out, the example reported %d", r, rec.Applied, control)
				}
				if int(worldPos[r-1]) != pos {
					t.Fatalf("after round %d the example is at %d, the world has it at %d", r, pos, worldPos[r-1])
				}
				if r < rounds {
					if next := record(t, f, r+1); next.Snapshot == nil || int(next.Snapshot.Ints[ex]) != pos {
						t.Fatalf("round %d: the example reported position %d; round %d was decided on %v", r, pos, r+1, next.Snapshot)
					}
				}
			}
		})
	}
}

// playOthers plays rounds 1..rounds of the world for every robot but ex:
// it reads every robot's decision once its round closed (the example's
// too, read-only), steps the world, and reports every other robot's
// observation; ex reports for itself. It returns the world's position of
// ex after each round.
func playOthers(t *testing.T, f *fleetRun, rounds, ex int) []int32 {
	t.Helper()
	var at []int32
	for round := 1; round <= rounds; round++ {
		views, errs := f.readDecisions(round)
		u := make([]int, len(f.bases))
		for r, v := range views {
			if errs[r] != nil || v.Hold {
				t.Fatalf("round %d: robot %d held: %+v %v", round, r, v, errs[r])
			}
			u[r] = v.Control
		}
		f.world.Apply(u)
		reportOthers(t, f, round, ex, u)
		pos, _ := f.world.Report(ex)
		at = append(at, pos)
	}
	return at
}

// reportOthers posts every robot's observation of round but ex's: where
// the world has it, the control it carried out, and what it saw.
func reportOthers(t *testing.T, f *fleetRun, round, ex int, u []int) {
	t.Helper()
	for r, b := range f.bases {
		if r == ex {
			continue
		}
		pos, seen := f.world.Report(r)
		body, _ := json.Marshal(node.Report{Round: uint64(round), Position: pos, Applied: u[r], Seen: seen})
		resp, err := f.client.Post(b+"/v1/observation", "application/json", bytes.NewReader(body))
		if err != nil {
			t.Fatalf("round %d: reporting robot %d: %v", round, r, err)
		}
		msg, _ := io.ReadAll(io.LimitReader(resp.Body, 4096))
		resp.Body.Close()
		if resp.StatusCode != http.StatusAccepted {
			t.Fatalf("round %d: robot %d's report refused: %s %s", round, r, resp.Status, msg)
		}
	}
}
