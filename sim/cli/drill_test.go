package cli

import (
	"cmp"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"baton/coordinator/view"
	"baton/signal"
	"baton/sim/drill"
	"baton/sim/fleetsum"
)

// processDrill runs one episode of a drill on real processes.
func processDrill(t *testing.T, text string) drill.Episode {
	t.Helper()
	d, err := drill.Parse(filepath.Join(t.TempDir(), "drill.yaml"), []byte(text))
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	// BATON_DRILL_TEST_LOGS keeps the fleets' logs there, to look into a failure.
	p := &processRunner{exe: simBin, logDir: cmp.Or(os.Getenv("BATON_DRILL_TEST_LOGS"), t.TempDir())}
	ep, err := p.RunProcess(ctx, d.Job(d.Points[0], 0, signal.Options{}))
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("events: %s", strings.Join(ep.Events, "; "))
	if !strings.Contains(ep.Events[len(ep.Events)-1], "no gap, no doubled round") {
		t.Fatalf("decision log not checked: %v", ep.Events)
	}
	return ep
}

const processBase = `
scenario: harbor
robots: 3
episodes: 2
seed: 4
samples: 4
horizon: 6
turn_deadline: 100ms
`

// A robot's daemon killed (SIGKILL) and restarted mid-drill: the others
// keep deciding; once it is back in the order, every robot decides every
// round; the decision log has no gap and no doubled round.
func TestProcessDrillRobotKilled(t *testing.T) {
	ep := processDrill(t, processBase+`rounds: 45
faults:
  - kind: kill-robot
    robots: [1]
    rounds: [4]
    down: 1s
`)
	back := slices.IndexFunc(ep.Rounds, func(r fleetsum.Round) bool { return r.Round > 4 && r.Decided[1] >= 0 })
	if back < 0 {
		t.Fatalf("robot 1 never decided again after its restart")
	}
	for _, r := range ep.Rounds {
		if r.Round < 4 || r.Round >= ep.Rounds[back].Round {
			if r.Held != 0 {
				t.Errorf("round %d: %d robots held with every robot alive (robot 1 back from round %d)", r.Round, r.Held, ep.Rounds[back].Round)
			}
		} else if r.Held > 1 || (r.Held == 1 && r.Decided[1] >= 0) {
			t.Errorf("round %d: only the dead robot may hold: %v", r.Round, r.Decided)
		}
	}
	t.Logf("robot 1 decided again from round %d", ep.Rounds[back].Round)
}

// The NATS server stopped and started again mid-drill: every robot
// decides every round once it is back (the clients reconnect on their
// own), and the decision log has no gap and no doubled round.
func TestProcessDrillNATSKilled(t *testing.T) {
	ep := processDrill(t, processBase+`rounds: 16
faults:
  - kind: kill-nats
    rounds: [5]
    down: 1s
`)
	for _, r := range ep.Rounds {
		if (r.Round < 5 || r.Round > 8) && r.Held != 0 {
			t.Errorf("round %d: %d robots held (the server was down in round 5 only)", r.Round, r.Held)
		}
	}
}

// The production daemons do not have the fault layer at all; the sim
// binary's daemons refuse it unless a drill started them.
func TestProductionDaemonsCannotLoseMessagesOnPurpose(t *testing.T) {
	out, err := exec.Command("go", "list", "-deps", "baton/agentd", "baton/coordinator").CombinedOutput()
	if err != nil {
		t.Fatalf("%v\n%s", err, out)
	}
	for _, dep := range strings.Fields(string(out)) {
		if strings.HasPrefix(dep, "baton/sim/fault") || dep == "baton/sim/drill" {
			t.Fatalf("a production daemon links the fault layer (%s)", dep)
		}
	}
	dir := t.TempDir()
	plan := filepath.Join(dir, "plan.json")
	if err := writePlan(plan, drillPlan{Seed: 1}); err != nil {
		t.Fatal(err)
	}
	for _, bin := range []string{"agentd", "coordinator"} {
		exe := filepath.Join(dir, bin)
		if out, err := exec.Command("go", "build", "-o", exe, "baton/"+bin).CombinedOutput(); err != nil {
			t.Fatalf("%v\n%s", err, out)
		}
		out, err := exec.Command(exe, "--drill-faults", plan).CombinedOutput()
		if err == nil || !strings.Contains(string(out), "flag provided but not defined: -drill-faults") {
			t.Errorf("./%s --drill-faults: %v\n%s", bin, err, out)
		}
	}
	cmd := exec.Command(simBin, "agentd", "--robot", "0", "--nats", "nats://127.0.0.1:1", "--http", "127.0.0.1:0", "--drill-faults", plan)
	cmd.Env = slices.DeleteFunc(os.Environ(), func(e string) bool { return strings.HasPrefix(e, DrillEnv+"=") })
	out, err = cmd.CombinedOutput()
	if err == nil || !strings.Contains(string(out), "--drill-faults is for fleets that sim drill or sim fleet start") {
		t.Errorf("sim agentd --drill-faults without %s=1: %v\n%s", DrillEnv, err, out)
	}
}

// The coordinator killed and restarted mid-drill: its new run continues
// the rounds from the durable log and the robots' reports, every robot
// decides every round, and the log holds rounds 1-14 once each, in two runs.
func TestProcessDrillCoordinatorKilled(t *testing.T) {
	ep := processDrill(t, processBase+`rounds: 14
faults:
  - kind: kill-coordinator
    rounds: [5]
    down: 3s
`)
	for _, r := range ep.Rounds {
		if r.Held != 0 {
			t.Errorf("round %d: %d robots held", r.Round, r.Held)
		}
	}
	if runs := ep.Events[len(ep.Events)-1]; !strings.HasSuffix(runs, "rounds 1-14 in 2 run(s), no gap, no doubled round") {
		t.Fatalf("want rounds 1-14 from two coordinator runs in the durable log: %s", runs)
	}
}

// Reports go where the user pointed: through a symlink to its target, into
// a device as it is, never over a directory; a failed write leaves nothing.
func TestWriteReport(t *testing.T) {
	dir := t.TempDir()
	link, target := filepath.Join(dir, "link.json"), filepath.Join(dir, "target.json")
	if err := os.Symlink(target, link); err != nil {
		t.Fatal(err)
	}
	hello := func(w io.Writer) error { _, err := io.WriteString(w, "{}"); return err }
	if err := writeReport(link, hello); err != nil {
		t.Fatal(err)
	}
	if fi, err := os.Lstat(link); err != nil || fi.Mode()&os.ModeSymlink == 0 {
		t.Fatalf("the link was replaced: %v %v", fi, err)
	}
	if b, _ := os.ReadFile(target); string(b) != "{}" {
		t.Fatalf("target holds %q", b)
	}
	if err := writeReport(os.DevNull, hello); err != nil {
		t.Fatal(err)
	}
	if fi, err := os.Stat(os.DevNull); err != nil || fi.Mode().IsRegular() {
		t.Fatalf("%s was replaced", os.DevNull)
	}
	if err := writable(dir); err == nil || !strings.Contains(err.Error(), "is a directory") {
		t.Fatalf("a directory as report: %v", err)
	}
	bad := filepath.Join(dir, "bad.json")
	if err := writeReport(bad, func(io.Writer) error { return errors.New("disk on fire") }); err == nil {
		t.Fatal("a failed write succeeded")
	}
	if entries, _ := os.ReadDir(dir); len(entries) != 2 {
		t.Fatalf("left behind: %v", entries)
	}
}

// The robot's local interface stays on localhost unless it has a token.
func TestLocalInterfaceNeedsATokenBeyondLocalhost(t *testing.T) {
	out, err := exec.Command(simBin, "agentd", "--robot", "0", "--nats", "nats://127.0.0.1:1", "--http", "0.0.0.0:0").CombinedOutput()
	ee, ok := err.(*exec.ExitError)
	if !ok || ee.ExitCode() != 2 || !strings.Contains(string(out), "--http 0.0.0.0:0 is reachable from other hosts: give --http-token-file") {
		t.Fatalf("%v\n%s", err, out)
	}
	tok := filepath.Join(t.TempDir(), "token")
	os.WriteFile(tok, []byte("short\n"), 0o600)
	out, err = exec.Command(simBin, "agentd", "--robot", "0", "--nats", "nats://127.0.0.1:1", "--http", "0.0.0.0:0", "--http-token-file", tok).CombinedOutput()
	if ee, ok := err.(*exec.ExitError); !ok || ee.ExitCode() != 2 || !strings.Contains(string(out), "at least 16 characters") {
		t.Fatalf("%v\n%s", err, out)
	}
}

// sim drill --html links the report to replay pages of the worst episodes
// of the costliest configurations, each holding every round of it.
func TestDrillReplayPages(t *testing.T) {
	dir := t.TempDir()
	file := filepath.Join(dir, "small.yaml")
	yaml := `name: small
scenario: harbor
robots: 3
rounds: 12
episodes: 2
seed: 3
samples: 4
horizon: 6
turn_deadline: 100ms
sweep:
  modes: [hybrid, parallel]
  guesses: [base]
  loss: [0, 0.3]
`
	if err := os.WriteFile(file, []byte(yaml), 0o644); err != nil {
		t.Fatal(err)
	}
	page := filepath.Join(dir, "report.html")
	out, err := exec.Command(simBin, "drill", "--file", file, "--html", page, "--no-gossip", "--replays", "2").CombinedOutput()
	if err != nil {
		t.Fatalf("%v\n%s", err, out)
	}
	report, _ := os.ReadFile(page)
	for _, n := range []int{1, 2} {
		name := fmt.Sprintf("report-worst-%d.html", n)
		if !strings.Contains(string(report), `href="`+name+`"`) {
			t.Fatalf("the report does not link %s", name)
		}
		replay, err := os.ReadFile(filepath.Join(dir, name))
		if err != nil {
			t.Fatal(err)
		}
		_, data, ok := strings.Cut(string(replay), `<script id="baton-data" type="application/json">`)
		data, _, _ = strings.Cut(data, "</script>")
		var got struct {
			Site   view.Site    `json:"site"`
			Frames []view.Frame `json:"frames"`
		}
		if !ok || json.Unmarshal([]byte(data), &got) != nil || len(got.Frames) != 12 || got.Site.Mode != "replay" {
			t.Fatalf("%s: %d frames, site %+v", name, len(got.Frames), got.Site)
		}
	}
	if _, err := os.Stat(filepath.Join(dir, "report-worst-3.html")); err == nil {
		t.Fatal("more replay pages than --replays asked for")
	}
}
