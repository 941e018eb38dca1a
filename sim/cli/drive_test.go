package cli

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"maps"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"baton/agentd/decide"
	"baton/coordinator/clock"
	"baton/deploy/shell"
	"baton/sim/episode"
	"baton/sim/fleetsum"
	"baton/sim/vfleet"
)

// remoteFleet starts what sim drive expects to find running: an embedded
// NATS server, a coordinator (run seed seed, so it decides what sim fleet
// --seed seed decides) and robots whose local interfaces want token. No
// round starts until someone reports round 0.
func remoteFleet(t *testing.T, robots int, seed uint64, token string, coordFlags ...string) *fleetRun {
	t.Helper()
	dir := t.TempDir()
	f := &fleetRun{o: fleetOpts{logDir: dir, exe: simBin}, client: &http.Client{Timeout: 30 * time.Second}, robots: make([]*proc, robots)}
	var err error
	if f.ns, f.url, err = shell.EmbeddedNATS("127.0.0.1", 0); err != nil {
		t.Fatal(err)
	}
	f.robotURL = f.url
	t.Cleanup(func() {
		f.close()
		if t.Failed() {
			for _, name := range []string{"coordinator", "agentd-0", "agentd-1", "agentd-2"} {
				b, _ := os.ReadFile(filepath.Join(dir, name+".log"))
				t.Logf("%s log:\n%s", name, b)
			}
		}
	})
	ports, err := freePorts(robots + 2)
	if err != nil {
		t.Fatal(err)
	}
	f.gossip, f.chttp = fmt.Sprintf("127.0.0.1:%d", ports[0]), fmt.Sprintf("127.0.0.1:%d", ports[1])
	common := []string{"--fleet", "remote", "--prefix", "baton", "--scenario", "harbor", "--robots", strconv.Itoa(robots)}
	args := append([]string{"coordinator", "--nats", f.url, "--seed", strconv.FormatUint(episode.FleetSeed(episode.Seed(seed, 0)), 10),
		"--decision-log", f.decisionLog(), "--http", f.chttp, "--gossip", f.gossip}, common...)
	if f.coord, err = f.spawn("coordinator", append(args, coordFlags...)); err != nil {
		t.Fatal(err)
	}
	tokenFile := filepath.Join(dir, "token")
	if err := os.WriteFile(tokenFile, []byte(token+"\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	f.common = append(common, "--http-token-file", tokenFile)
	for r := range robots {
		f.bases = append(f.bases, fmt.Sprintf("http://127.0.0.1:%d", ports[2+r]))
		if err := f.startRobot(r); err != nil {
			t.Fatal(err)
		}
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	for r := range robots {
		if err := f.waitRobot(ctx, r); err != nil {
			t.Fatal(err)
		}
	}
	if err := f.waitAlive(ctx, robots, 20*time.Second); err != nil {
		t.Fatal(err)
	}
	return f
}

func writeToken(t *testing.T, token string) string {
	t.Helper()
	file := filepath.Join(t.TempDir(), "token")
	if err := os.WriteFile(file, []byte(token), 0o600); err != nil {
		t.Fatal(err)
	}
	return file
}

const driveToken = "drive-test-token-0123456789"

// Flags are checked before anything is asked of a robot.
func TestDriveFlags(t *testing.T) {
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{}, "--robot-http is required"},
		{[]string{"--robot-http", "localhost:7400"}, `URL 1 (robot 0) "localhost:7400": not an http or https URL`},
		{[]string{"--robot-http", "http://a:7400,ftp://b:7400"}, `URL 2 (robot 1) "ftp://b:7400"`},
		{[]string{"--robot-http", "http://a:7400,"}, "URL 2 (robot 1) \"\": empty"},
		{[]string{"--robot-http", "http://:7400"}, "no host"},
		{[]string{"--robot-http", "http://a:99999"}, "bad port"},
		{[]string{"--robot-http", "http://u:p@a:7400"}, "credentials belong in --http-token-file"},
		{[]string{"--robot-http", "http://a:7400,http://a:7400/"}, "given for robot 0 and robot 1"},
		{[]string{"--robot-http", "http://a:1,http://b:1", "--robots", "3"}, "names 2 robots, the scenario has 3"},
		{[]string{"--robot-http", "http://a:1", "--wait", "2m"}, "--wait 2m0s: want a duration above 0 and up to 1m0s"},
		{[]string{"--robot-http", "http://a:1", "--rounds", "0"}, "--rounds 0"},
		{[]string{"--robot-http", "http://a:1", "--http-token-file", "/nonexistent/token"}, "--http-token-file"},
	} {
		_, errOut, code := runSim(t, append([]string{"drive"}, c.args...)...)
		if code == 0 || !strings.Contains(errOut, c.want) {
			t.Errorf("sim drive %v: exit %d, want an error with %q:\n%s", c.args, code, c.want, errOut)
		}
	}
	out, _, code := runSim(t, "drive", "--seed", "5", "--print-coordinator-seed")
	if want := strconv.FormatUint(episode.FleetSeed(episode.Seed(5, 0)), 10); code != 0 || strings.TrimSpace(out) != want {
		t.Errorf("--print-coordinator-seed: %q (exit %d), want %s", out, code, want)
	}
}

// A drive against a running fleet plays the same world and gets the same
// decisions as sim fleet with the same seed (the virtual fleet's digest,
// which equals the process fleet's); before that, the preflight refuses
// a wrong token, a missing one, a robot that does not answer and URLs out
// of robot order, naming the robot.
func TestDriveMatchesFleet(t *testing.T) {
	const robots, rounds, seed = 3, 6, 5
	f := remoteFleet(t, robots, seed, driveToken, "--rounds", strconv.Itoa(rounds), "--samples", "4", "--horizon", "6")
	o := driveOpts{sc: scenarioFlags{name: "harbor", robots: robots}, bases: f.bases, token: driveToken,
		rounds: rounds, seed: seed, wait: 10 * time.Second, healthDue: defaultHealthEvery}
	refused := func(change func(*driveOpts), want string) {
		t.Helper()
		bad := o
		bad.bases = slices.Clone(o.bases)
		change(&bad)
		var out bytes.Buffer
		err := runDrive(context.Background(), bad, &out)
		if err == nil || !strings.Contains(err.Error(), want) {
			t.Errorf("want an error with %q, got %v", want, err)
		}
	}
	refused(func(o *driveOpts) { o.token = "not-the-token-0123456789" }, "robot 0 at "+f.bases[0]+" refused the token (401 Unauthorized)")
	refused(func(o *driveOpts) { o.token = "" }, "wants a token (401 Unauthorized): give --http-token-file")
	refused(func(o *driveOpts) { o.bases[1] = "http://127.0.0.1:1" }, "robot 1 at http://127.0.0.1:1 is unreachable")
	refused(func(o *driveOpts) { o.bases[0], o.bases[2] = o.bases[2], o.bases[0] }, "serves robot 2, not robot 0: give the URLs in robot order")

	// The real thing, as a user runs it.
	out, errOut, code := runSim(t, "drive", "--robot-http", strings.Join(f.bases, ","), "--http-token-file", writeToken(t, driveToken),
		"--rounds", strconv.Itoa(rounds), "--seed", strconv.Itoa(seed), "--json")
	if code != 0 {
		t.Fatalf("exit %d: %s\n%s", code, errOut, out)
	}
	var rep driveReport
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatalf("not JSON: %v\n%s", err, out)
	}
	if !rep.OK || rep.Rounds != rounds || rep.RobotsHeld != 0 || len(rep.Holds) != 0 || rep.RefusedObservations != 0 {
		t.Fatalf("drive report %s", out)
	}

	c := clock.DefaultConfig()
	c.Rounds, c.Decide = rounds, decide.Config{Samples: 4, Horizon: 6}
	vf, err := startVirtual(fleetOpts{sc: scenarioFlags{name: "harbor", robots: robots}, clock: c, seed: seed, fleet: "remote", prefix: "baton",
		turnTime: defaultTurnTime, link: vfleet.Link{Hop: defaultHop, Seed: seed}})
	if err != nil {
		t.Fatal(err)
	}
	var sum fleetsum.Summary
	tally := fleetsum.NewTally()
	if _, err := vf.Run(rounds, func(r fleetsum.Round) { tally.Add(&sum, r) }); err != nil {
		t.Fatal(err)
	}
	tally.Finish(&sum)
	if sum.DecisionsSHA256 != rep.DecisionsSHA256 || sum.Cost != rep.Cost {
		t.Fatalf("drive decided %s (cost %g), sim fleet with the same seed %s (cost %g)", rep.DecisionsSHA256, rep.Cost, sum.DecisionsSHA256, sum.Cost)
	}
}

// A robot whose daemon is killed holds without failing the drive; robots
// that hold while healthy (here: the coordinator stopped after its last
// round, and the drive plays two more) fail it, and the error names the
// rounds and robots. A second drive is refused: the robots are past round 0.
// (The drive waits 2.5 s: a round with the killed robot in its order closes
// at that robot's deadline, later still on a loaded machine.)
func TestDriveNamesHeldRounds(t *testing.T) {
	const robots = 3
	f := remoteFleet(t, robots, 2, driveToken, "--rounds", "5", "--samples", "4", "--horizon", "6", "--report-wait", "300ms")
	cmd := exec.Command(simBin, "drive", "--robot-http", strings.Join(f.bases, ","), "--http-token-file", writeToken(t, driveToken),
		"--rounds", "7", "--seed", "2", "--wait", "2500ms", "--json")
	var stdout, stderr bytes.Buffer
	cmd.Stdout, cmd.Stderr = &stdout, &stderr
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	record(t, f, 2)
	f.kill(2)
	err := cmd.Wait()
	if ee, ok := err.(*exec.ExitError); !ok || ee.ExitCode() != 1 {
		t.Fatalf("want exit 1, got %v\n%s\n%s", err, stderr.String(), stdout.String())
	}
	var rep driveReport
	if err := json.Unmarshal(stdout.Bytes(), &rep); err != nil {
		t.Fatalf("not JSON: %v\n%s", err, stdout.String())
	}
	failed := map[[2]int]bool{}
	for _, h := range rep.Holds {
		if h.Robot == 2 != h.Excused {
			t.Errorf("hold %+v: only the killed robot is excused", h)
		}
		if h.Robot == 2 && !strings.Contains(h.Why, "daemon down") {
			t.Errorf("killed robot's hold says %q", h.Why)
		}
		if !h.Excused {
			failed[[2]int{h.Round, h.Robot}] = true
		}
	}
	want := map[[2]int]bool{{6, 0}: true, {6, 1}: true, {7, 0}: true, {7, 1}: true}
	if !maps.Equal(failed, want) || rep.OK || rep.Failed != 4 {
		t.Fatalf("failed robot-rounds %v, want %v (report %s)", failed, want, stdout.String())
	}
	msg := stderr.String()
	for _, s := range []string{"4 robot-rounds held while their daemons were up and healthy", "round 6: robot 0 (held", "round 7: robot 0 (held", ", robot 1 (held"} {
		if !strings.Contains(msg, s) {
			t.Errorf("the error lacks %q:\n%s", s, msg)
		}
	}
	if strings.Contains(msg, "robot 2") {
		t.Errorf("the killed robot is named as a failure:\n%s", msg)
	}

	o := driveOpts{sc: scenarioFlags{name: "harbor", robots: 2}, bases: f.bases[:2], token: driveToken, rounds: 1, seed: 2, wait: time.Second}
	if err := runDrive(context.Background(), o, &bytes.Buffer{}); err == nil || !strings.Contains(err.Error(), "is already in round 5") {
		t.Fatalf("a second drive: %v", err)
	}
}
