package cli

import (
	"context"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"syscall"
	"testing"
	"time"
)

// labOrSkip skips a test of deploy/lab.sh where it cannot run (not root,
// no network namespaces, no tc or curl), unless CI_REQUIRE_LAB=1, which
// makes that a failure.
func labOrSkip(t *testing.T) {
	t.Helper()
	skip := func(why string) {
		t.Helper()
		if os.Getenv("CI_REQUIRE_LAB") == "1" {
			t.Fatalf("CI_REQUIRE_LAB=1, but %s", why)
		}
		t.Skipf("the multi-host lab cannot run here: %s (CI_REQUIRE_LAB=1 makes this a failure)", why)
	}
	if os.Geteuid() != 0 {
		skip("it needs root (network namespaces)")
	}
	if out, err := exec.Command("ip", "netns", "list").CombinedOutput(); err != nil {
		skip("ip netns does not work: " + strings.TrimSpace(string(out)))
	}
	for _, tool := range []string{"tc", "curl", "timeout"} {
		if _, err := exec.LookPath(tool); err != nil {
			skip(tool + " is not installed")
		}
	}
}

// runLab runs deploy/lab.sh with args; a lab that overruns limit gets a
// SIGTERM, so its trap still tears it down.
func runLab(t *testing.T, limit time.Duration, args ...string) (string, int, string) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), limit)
	defer cancel()
	cmd := exec.CommandContext(ctx, "bash", append([]string{"../../deploy/lab.sh"}, args...)...)
	cmd.Cancel = func() error { return cmd.Process.Signal(syscall.SIGTERM) }
	cmd.WaitDelay = 20 * time.Second
	out, err := cmd.CombinedOutput()
	code := 0
	if ee, ok := err.(*exec.ExitError); ok {
		code = ee.ExitCode()
	} else if err != nil {
		t.Fatalf("running the lab: %v\n%s", err, out)
	}
	if ctx.Err() != nil {
		t.Errorf("the lab took over %s", limit)
	}
	id := regexp.MustCompile(`(?m)^lab (\d+): `).FindStringSubmatch(string(out))
	if id == nil {
		t.Fatalf("the lab did not say its id (exit %d):\n%s", code, out)
	}
	return string(out), code, id[1]
}

// labGone checks that nothing of lab id is left: namespaces, temp dir.
func labGone(t *testing.T, id string) {
	t.Helper()
	out, _ := exec.Command("ip", "netns", "list").Output()
	if strings.Contains(string(out), "baton-lab-"+id+"-") {
		t.Errorf("namespaces of lab %s left behind:\n%s", id, out)
	}
	if left, _ := filepath.Glob("/tmp/baton-lab-" + id + "-work.*"); len(left) > 0 {
		t.Errorf("temp dir left behind: %v", left)
	}
	// Every lab process runs a binary from its temp dir.
	cmdlines, _ := filepath.Glob("/proc/[0-9]*/cmdline")
	for _, f := range cmdlines {
		if b, err := os.ReadFile(f); err == nil && strings.Contains(string(b), "/tmp/baton-lab-"+id+"-work.") {
			t.Errorf("a process of the lab is still running: %s: %q", f, b)
		}
	}
}

// A small lab across network namespaces: three clustered NATS servers, the
// coordinator, three robots (one on a 256 kbit/s link) and the driver.
// Killing the coordinator's NATS server at round 10 loses no round for any
// robot, the failover figures are printed, and everything is torn down.
func TestLab(t *testing.T) {
	labOrSkip(t)
	t0 := time.Now()
	out, code, id := runLab(t, 90*time.Second, "--robots", "3", "--rounds", "20", "--kill-nats-at", "10", "--rate-limit", "1=256kbit")
	t.Logf("lab took %s:\n%s", time.Since(t0).Round(time.Millisecond), out)
	if code != 0 {
		t.Fatalf("lab exit %d", code)
	}
	for _, want := range []string{"SIGKILLed", "rounds affected (a robot held): 0", "rounds full again: ",
		"durable decision log: rounds 1-20 in 1 run(s), no gap, no doubled round",
		"every round completed for every live robot", "torn down"} {
		if !strings.Contains(out, want) {
			t.Errorf("the lab's output lacks %q", want)
		}
	}
	labGone(t, id)
	if logs, _ := filepath.Glob("/tmp/baton-lab-" + id + "-logs.*"); len(logs) > 0 {
		t.Errorf("logs of a good run without --keep left behind: %v", logs)
	}
}

// A lab that fails (here on purpose, once the fleet is up) still tears
// down every namespace, process and temp dir, and keeps its logs.
func TestLabTearsDownOnFailure(t *testing.T) {
	labOrSkip(t)
	out, code, id := runLab(t, 60*time.Second, "--robots", "2", "--rounds", "5", "--fail-at", "fleet")
	if code != 1 || !strings.Contains(out, "failing on purpose after stage fleet") {
		t.Fatalf("want exit 1 on purpose, got %d:\n%s", code, out)
	}
	labGone(t, id)
	logs, _ := filepath.Glob("/tmp/baton-lab-" + id + "-logs.*")
	if len(logs) != 1 {
		t.Fatalf("want the failed lab's logs kept, found %v:\n%s", logs, out)
	}
	defer os.RemoveAll(logs[0])
	for _, name := range []string{"coordinator.log", "agentd-0.log", "agentd-1.log", "nats-a.log"} {
		if _, err := os.Stat(filepath.Join(logs[0], name)); err != nil {
			t.Errorf("log %s: %v", name, err)
		}
	}
}
