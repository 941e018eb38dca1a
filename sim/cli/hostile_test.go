package cli

import (
	"context"
	"fmt"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"baton/agentd/turn"
	"baton/coordinator/clock"
	"baton/deploy/shell"
	pb "baton/proto"
	"baton/proto/wire"
	"baton/sim/model"
)

// metric reads one labelled counter from a /metrics page (0 when absent).
func metric(t *testing.T, f *fleetRun, url, name, reason string) float64 {
	t.Helper()
	resp, err := f.client.Get(url + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	body, _ := io.ReadAll(resp.Body)
	re := regexp.MustCompile(`(?m)^` + name + `\{reason="` + regexp.QuoteMeta(reason) + `"\} (\S+)$`)
	m := re.FindSubmatch(body)
	if m == nil {
		return 0
	}
	v, _ := strconv.ParseFloat(string(m[1]), 64)
	return v
}

// Hostile messages on the real bus reach real daemons: each is dropped and
// counted by its reason at every robot (or at the coordinator), and the
// fleet keeps deciding every round.
func TestHostileMessages(t *testing.T) {
	const robots = 3
	f := testFleet(t, opts("harbor", robots, 200, 6, nil))
	for r := 1; r <= 2; r++ {
		if res := f.play(r); res.Held != 0 {
			t.Fatalf("round %d: %d held before any hostile message", r, res.Held)
		}
	}
	rec := record(t, f, 2)
	digest, err := shell.Digest("harbor", "", robots)
	if err != nil {
		t.Fatal(err)
	}
	nc, err := nats.Connect(f.url)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	subj, _ := pb.NewSubjects("baton", "test")
	send := func(subject string, data []byte, err error) {
		t.Helper()
		if err != nil {
			t.Fatal(err)
		}
		if err := nc.Publish(subject, data); err != nil {
			t.Fatal(err)
		}
	}
	start := func(round uint64, mutate func(*turn.Start)) {
		s := turn.Start{Fleet: "test", Epoch: rec.Epoch, Round: round, Sender: "intruder", Scenario: "harbor",
			Ints: rec.Snapshot.Ints, Reals: rec.Snapshot.Reals, Order: []uint32{0, 1, 2}, DeadlinesUs: []uint64{1e5, 2e5, 3e5},
			Mode: turn.Hybrid, Params: turn.Params{Samples: 4, Horizon: 6}, Digest: digest, Guess: "base"}
		mutate(&s)
		data, err := wire.EncodeStart(s)
		send(subj.Round, data, err)
	}
	// Absurd Monte Carlo effort (used to run every daemon out of memory).
	start(3, func(s *turn.Start) { s.Params.Samples = 1 << 31 })
	// A far-future round (used to leave every robot holding).
	start(1<<40, func(*turn.Start) {})
	// Closes with controls that do not exist, and for a round not started.
	data, err := wire.EncodeClose(turn.Close{Fleet: "test", Epoch: rec.Epoch, Round: 2, Controls: []int32{-99, 0, 0}, Held: []uint32{}})
	send(subj.Close, data, err)
	data, err = wire.EncodeClose(turn.Close{Fleet: "test", Epoch: rec.Epoch, Round: 500, Controls: []int32{0, 0, 0}})
	send(subj.Close, data, err)
	// Robot 1's decision on robot 2's subject.
	data, err = wire.EncodeDecision(turn.Decision{Fleet: "test", Epoch: rec.Epoch, Round: 3, Robot: 1, Control: 1})
	send(subj.DecisionOf(2), data, err)
	// An observation naming robot 2 on robot 0's subject.
	data, err = wire.EncodeReport(turn.Report{Fleet: "test", Epoch: rec.Epoch, Round: 2, Robot: 2, Position: 0})
	send(subj.ObsOf(0), data, err)
	// A report request from a run older than the one followed.
	data, err = wire.EncodeHello(turn.Hello{Fleet: "test", Epoch: rec.Epoch - 1, Sender: "intruder-hello"})
	send(subj.Hello, data, err)
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}

	for r := 3; r <= 8; r++ {
		if res := f.play(r); res.Held != 0 {
			t.Fatalf("round %d after the hostile messages: %d robots held", r, res.Held)
		}
	}
	const robotDrops = "baton_messages_dropped_total"
	for r, b := range f.bases {
		for _, reason := range []string{"out-of-bounds", "future", "out-of-range", "wrong-subject"} {
			want := 1.0
			if reason == "future" {
				want = 2 // the far-future round start and the close of round 500
			}
			if got := metric(t, f, b, robotDrops, reason); got < want {
				t.Errorf("agentd %d counted %g %q drops, want at least %g", r, got, reason, want)
			}
		}
	}
	// Stale messages also come in normal traffic: find this one in the log
	// (each daemon logs the first drop of each reason and sender).
	for r := range f.bases {
		b, _ := os.ReadFile(fmt.Sprintf("%s/agentd-%d.log", f.o.logDir, r))
		if !strings.Contains(string(b), `"reason": "stale", "sender": "intruder-hello"`) {
			t.Errorf("agentd %d did not drop the old run's report request as stale:\n%s", r, b)
		}
	}
	coord := "http://" + f.chttp
	for _, reason := range []string{"wrong-subject"} {
		if got := metric(t, f, coord, "baton_coordinator_dropped_total", reason); got < 2 {
			t.Errorf("coordinator counted %g %q drops, want the decision and the report", got, reason)
		}
	}
}

// A coordinator SIGKILLed mid-round (the robots' software has round 4's
// decisions and carried them out; the reports are not in) and started
// again: the robots follow the new run at once; it continues the numbering
// from the durable log (round 5: no round lost, none numbered twice); its
// first round has every robot where it reported after round 4; the log
// tells the runs apart; and replaying the log reproduces the cost the
// world charged.
func TestFleetCoordinatorKilled(t *testing.T) {
	f := testFleet(t, opts("harbor", 3, 200, 4, nil))
	var cost float64
	play := func(r int) {
		t.Helper()
		res := f.play(r)
		if f.hookErr != nil {
			t.Fatal(f.hookErr)
		}
		if res.Held != 0 {
			t.Fatalf("round %d: %d held", r, res.Held)
		}
		cost += res.Cost
	}
	for r := 1; r <= 3; r++ {
		play(r)
	}
	old := record(t, f, 3)
	ctx, cancel := context.WithTimeout(context.Background(), 45*time.Second)
	defer cancel()
	// Down long enough for gossip to declare it dead everywhere.
	f.beforeReport = func() error { return f.restartCoordinator(ctx, 3*time.Second) }
	play(4)
	waitNewRun(t, f)
	// Where the robots are: what they reported after round 4 (the world
	// has not moved since).
	reported := make([]int32, f.m.Robots())
	for r := range reported {
		reported[r], _ = f.world.Report(r)
	}
	if first := roundOf(t, f, 0); first != 5 {
		t.Fatalf("the new run started at round %d; the old one had closed round 4", first)
	}
	for r := 5; r <= 7; r++ {
		play(r)
	}
	rec := record(t, f, 5)
	if rec.Epoch <= old.Epoch {
		t.Fatalf("round 5 logged by run %d, not a newer run than %d", rec.Epoch, old.Epoch)
	}
	record(t, f, 7)
	res, err := f.replay()
	if err != nil {
		t.Fatal(err)
	}
	if !res.Continuous() || len(res.Runs) != 2 || res.Runs[0].Epoch != old.Epoch || res.Runs[1].First != 5 ||
		res.Runs[0].Last != 4 || res.Runs[0].Unfiled != 1 || res.First != 1 {
		t.Fatalf("durable log: %s, runs %+v", res.Summary(), res.Runs)
	}
	if replayed := res.costOf(7); replayed != cost {
		t.Fatalf("replaying rounds 1-7 costs %.17g, the world charged %.17g", replayed, cost)
	}
	// The new run's first round decided on the positions the robots
	// reported, which are the world's.
	x := f.m.NewState()
	if err := f.m.Unflatten(x, rec.Snapshot.Ints, rec.Snapshot.Reals); err != nil {
		t.Fatal(err)
	}
	// A coordinator that ignored the reports would start from this.
	blank := f.m.NewState()
	f.m.Start(blank, model.NewRNG(0).Rand)
	moved := false
	for r, want := range reported {
		moved = moved || f.m.Position(blank, r) != want
		if got := f.m.Position(x, r); got != want {
			t.Errorf("new run's round 5 has robot %d at %d, it reported %d", r, got, want)
		}
	}
	if !moved {
		t.Fatal("the robots are where a fresh coordinator would put them anyway: the check proves nothing")
	}
	coordLog, _ := os.ReadFile(f.o.logDir + "/coordinator.log")
	for _, bad := range []string{"without a report", "did not come within"} {
		if strings.Contains(string(coordLog), bad) {
			t.Errorf("the restarted coordinator started without some robot's current report:\n%s", coordLog)
		}
	}
	if !strings.Contains(string(coordLog), "continuing the fleet's rounds from the durable log") {
		t.Errorf("the restarted coordinator does not say it continued from the log:\n%s", coordLog)
	}
}

// roundOf is the round robot r follows, from its /healthz.
func roundOf(t *testing.T, f *fleetRun, r int) int {
	t.Helper()
	resp, err := f.client.Get(f.bases[r] + "/healthz")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	body, _ := io.ReadAll(resp.Body)
	_, n, ok := strings.Cut(strings.TrimSpace(string(body)), " round ")
	v, err := strconv.Atoi(n)
	if !ok || err != nil {
		t.Fatalf("robot %d /healthz: %q", r, body)
	}
	return v
}

// Sequential mode with a robot whose decisions never come in time: every
// round closes at the last deadline, the robots after it hold, the round's
// real latency is reported to every robot's software, and the coordinator
// names the robot that stalled (not the ones that waited).
func TestSequentialStall(t *testing.T) {
	const budget = 150 * time.Millisecond
	o := opts("harbor", 4, 200, 2, func(c *clock.Config) { c.Mode, c.TurnBudget = turn.Sequential, budget })
	o.slow = faults{1: 2 * time.Second}
	f := testFleet(t, o)
	for r := 1; r <= 3; r++ {
		res := f.play(r)
		if res.Held != 3 || res.Decided[0] < 0 {
			t.Fatalf("round %d: %+v, want robot 0 decided and 1, 2, 3 held", r, res)
		}
		if lat := time.Duration(res.LatencyUs) * time.Microsecond; lat < 4*budget || lat > 4*budget+200*time.Millisecond {
			t.Fatalf("round %d: latency %s, want the last deadline %s", r, lat, 4*budget)
		}
		rec := record(t, f, r)
		if rec.Stalled == nil || *rec.Stalled != 1 {
			t.Fatalf("round %d: stalled_by %v, want robot 1", r, rec.Stalled)
		}
	}
	b, _ := os.ReadFile(f.o.logDir + "/coordinator.log")
	logText := string(b)
	if !strings.Contains(logText, "stalled on robot 1") || !strings.Contains(logText, "robots [2 3] after it were waiting") {
		t.Fatalf("the coordinator does not name the robot that stalled:\n%s", logText)
	}
	if strings.Contains(logText, "robot 2 is alive but has missed") || strings.Contains(logText, "robot 3 is alive but has missed") {
		t.Fatalf("the coordinator blames robots that were only waiting:\n%s", logText)
	}
}

// waitNewRun waits until every robot follows a run's round 1 again.
func waitNewRun(t *testing.T, f *fleetRun) {
	t.Helper()
	if err := f.waitNewRun(20 * time.Second); err != nil {
		t.Fatal(err)
	}
}

// A second daemon for a robot that is live is refused at its start, and
// both daemons' logs name the other process; the fleet goes on.
func TestSecondDaemonForALiveRobot(t *testing.T) {
	f := testFleet(t, opts("harbor", 3, 200, 4, nil))
	if res := f.play(1); res.Held != 0 {
		t.Fatalf("round 1: %d held", res.Held)
	}
	args := append([]string{"agentd", "--nats", f.robotURL}, f.common...)
	args = append(args, "--robot", "1", "--http", "127.0.0.1:0", "--join", f.gossip)
	cmd := exec.Command(simBin, args...)
	out, err := cmd.CombinedOutput()
	ee, ok := err.(*exec.ExitError)
	if !ok || ee.ExitCode() != 1 || !strings.Contains(string(out), "robot-1 is already live: gossip member") ||
		!strings.Contains(string(out), "refusing to run a second daemon") {
		t.Fatalf("second daemon for robot 1: %v\n%s", err, out)
	}
	deadline := time.Now().Add(5 * time.Second)
	for {
		b, _ := os.ReadFile(filepath.Join(f.o.logDir, "agentd-1.log"))
		if strings.Contains(string(b), "another daemon claims this robot") {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("robot 1's daemon did not log the second claim:\n%s", b)
		}
		time.Sleep(50 * time.Millisecond)
	}
	if res := f.play(2); res.Held != 0 {
		t.Fatalf("round 2 after the refused daemon: %d held", res.Held)
	}
}

// A whole fleet runs as on a site (--secure): every process with its own
// nkey and permissions, TLS to the server. The rounds go as without, and a
// client without credentials, or without TLS, cannot connect.
func TestSecureFleet(t *testing.T) {
	o := opts("harbor", 3, 200, 4, nil)
	o.secure = true
	f := testFleet(t, o)
	for r := 1; r <= 3; r++ {
		if res := f.play(r); res.Held != 0 {
			t.Fatalf("round %d: %d held", r, res.Held)
		}
	}
	if nc, err := nats.Connect(f.url, nats.RootCAs(f.sec.pki.CA), nats.MaxReconnects(0)); err == nil {
		nc.Close()
		t.Fatal("a client without credentials connected")
	}
	if nc, err := nats.Connect(f.url, nats.MaxReconnects(0)); err == nil {
		nc.Close()
		t.Fatal("a client without TLS or credentials connected")
	}
	record(t, f, 3)
	res, err := f.replay()
	if err != nil || res.Rounds < 3 || !res.Continuous() {
		t.Fatalf("durable log under permissions: %v %s", err, res.Summary())
	}
}
