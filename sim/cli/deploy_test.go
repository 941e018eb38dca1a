package cli

import (
	"context"
	"encoding/json"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"

	"baton/deploy/shell"
)

// The shipped NATS cluster configurations load (with the authorization
// block sim creds writes), route to the other two nodes and take robots'
// leaf nodes in the JetStream domain the leaf template maps to; the
// shipped leaf template loads with a robot's leaf identity from sim creds.
// (deploy/shell's TestLeafNodeOnRobot runs them.)
func TestDeployNATSConfigs(t *testing.T) {
	files, _ := filepath.Glob("../../deploy/nats/node-*.conf")
	if len(files) != 3 {
		t.Fatalf("want 3 cluster node configurations, found %v", files)
	}
	ids, err := shell.FleetIdentities("baton", "yard", 2)
	if err != nil {
		t.Fatal(err)
	}
	for _, f := range files {
		dir := t.TempDir()
		if err := shell.WriteFleetCredentials(dir, ids); err != nil {
			t.Fatal(err)
		}
		data, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		conf := strings.Replace(string(data), "/var/lib/nats", filepath.ToSlash(filepath.Join(dir, "js")), 1)
		path := filepath.Join(dir, filepath.Base(f))
		os.WriteFile(path, []byte(conf), 0o600)
		opts, err := server.ProcessConfigFile(path)
		if err != nil {
			t.Fatalf("%s: %v", f, err)
		}
		if len(opts.Routes) != 2 || !opts.JetStream || len(opts.Nkeys) != 3 || opts.Cluster.Name != "baton" {
			t.Fatalf("%s: %d routes, jetstream %v, %d users, cluster %q", f, len(opts.Routes), opts.JetStream, len(opts.Nkeys), opts.Cluster.Name)
		}
		if opts.LeafNode.Port != 7422 || opts.JetStreamDomain != shell.HubDomain {
			t.Fatalf("%s: leaf node port %d, JetStream domain %q (want 7422, %q)", f, opts.LeafNode.Port, opts.JetStreamDomain, shell.HubDomain)
		}
	}

	dir := t.TempDir()
	if err := shell.WriteFleetCredentials(dir, ids); err != nil {
		t.Fatal(err)
	}
	identity, err := os.ReadFile(filepath.Join(dir, "robot-1.leaf.conf"))
	if err != nil {
		t.Fatal(err)
	}
	os.WriteFile(filepath.Join(dir, "leaf-identity.conf"), identity, 0o600)
	data, err := os.ReadFile("../../deploy/nats/leaf-robot.conf")
	if err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(dir, "leaf-robot.conf")
	os.WriteFile(path, data, 0o600)
	opts, err := server.ProcessConfigFile(path)
	if err != nil {
		t.Fatalf("leaf-robot.conf: %v", err)
	}
	if opts.Host != "127.0.0.1" || opts.Port != 4222 || opts.JetStream || len(opts.Nkeys) != 1 || opts.Nkeys[0].Nkey != ids[2].Public ||
		len(opts.LeafNode.Remotes) != 1 || opts.LeafNode.Remotes[0].Nkey != string(ids[2].Seed) {
		t.Fatalf("leaf-robot.conf: listens on %s:%d, jetstream %v, %d local users, remotes %+v", opts.Host, opts.Port, opts.JetStream, len(opts.Nkeys), opts.LeafNode.Remotes)
	}
	var urls []string
	for _, u := range opts.LeafNode.Remotes[0].URLs {
		urls = append(urls, u.String())
	}
	if strings.Join(urls, " ") != "nats-leaf://nats-a:7422 nats-leaf://nats-b:7422 nats-leaf://nats-c:7422" {
		t.Fatalf("leaf-robot.conf: the leaf connects to %v, want all three cluster nodes on 7422", urls)
	}
}

// The systemd units pass only flags the daemons have.
func TestDeployUnitsUseRealFlags(t *testing.T) {
	flagsOf := func(cmd string) map[string]bool {
		out, _ := exec.Command(simBin, cmd, "-h").CombinedOutput()
		have := map[string]bool{}
		for _, m := range regexp.MustCompile(`(?m)^  --?([a-z][a-z-]*)`).FindAllStringSubmatch(string(out), -1) {
			have[m[1]] = true
		}
		if len(have) < 10 {
			t.Fatalf("%s -h listed %d flags:\n%s", cmd, len(have), out)
		}
		return have
	}
	for unit, cmd := range map[string]string{"baton-agentd@.service": "agentd", "baton-coordinator.service": "coordinator"} {
		data, err := os.ReadFile(filepath.Join("../../deploy/systemd", unit))
		if err != nil {
			t.Fatal(err)
		}
		have := flagsOf(cmd)
		exec := strings.ReplaceAll(string(data), "\\\n", " ")
		line := regexp.MustCompile(`(?m)^ExecStart=(.*)$`).FindStringSubmatch(exec)
		if line == nil || !strings.Contains(line[1], "/"+cmd+" ") {
			t.Fatalf("%s: no ExecStart running %s", unit, cmd)
		}
		for _, m := range regexp.MustCompile(`--([a-z-]+)`).FindAllStringSubmatch(line[1], -1) {
			if !have[m[1]] {
				t.Errorf("%s passes --%s, which %s does not have", unit, m[1], cmd)
			}
		}
		for _, want := range []string{"Restart=on-failure", "NoNewPrivileges=yes", "ProtectSystem=strict", "DynamicUser=yes"} {
			if !strings.Contains(string(data), want) {
				t.Errorf("%s lacks %s", unit, want)
			}
		}
	}
}

// A short soak: a process fleet under 10% loss for 200 rounds leaks no
// goroutines, heap or descriptors (generous bounds; `sim soak` runs the
// long one).
func TestShortSoak(t *testing.T) {
	o := fleetOpts{sc: scenarioFlags{name: "harbor", robots: 3}, clock: defaultSoakClock(), seed: 2, fleet: "soak",
		prefix: "baton", exe: simBin, logDir: t.TempDir()}
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()
	s, err := soak(ctx, o, 200, 50, nil)
	if err != nil {
		t.Fatal(err)
	}
	first, last := s[0], s[len(s)-1]
	t.Logf("first %+v", first)
	t.Logf("last  %+v", last)
	if last.Goroutines > first.Goroutines+10 || last.FDs > first.FDs+10 || last.HeapMB > 64 || last.Held > 20 {
		t.Fatalf("after %d rounds: goroutines %v -> %v, fds %v -> %v, heap %.1f MB, %d held", last.Round,
			first.Goroutines, last.Goroutines, first.FDs, last.FDs, last.HeapMB, last.Held)
	}
	if last.LogKB <= first.LogKB {
		t.Fatal("the decision log did not grow")
	}
	// Two records a round in the durable log (the write-ahead one at the
	// close, the filed one), give or take the round in play (records are
	// written off the round loop, the coordinator may be a round ahead).
	if last.Records < 2*200-2 || last.Records > 2*200+4 {
		t.Fatalf("the durable log holds %d records after 200 rounds", last.Records)
	}
}

// The example fleet file runs as a whole fleet, flags on the command line
// overriding it; agentd takes it with --robot, and its own flags win too.
func TestFleetFileRuns(t *testing.T) {
	out, err := exec.Command(simBin, "fleet", "--fleet-file", "../../deploy/examples/fleet.yaml", "--rounds", "3", "--period", "0", "--json").Output()
	if err != nil {
		t.Fatalf("%v\n%s", err, out)
	}
	var sum struct {
		Scenario string `json:"scenario"`
		Robots   int    `json:"robots"`
		Rounds   int    `json:"rounds"`
		Held     int    `json:"robot_rounds_held"`
	}
	if err := json.Unmarshal(out, &sum); err != nil || sum.Scenario != "upkeep" || sum.Robots != 4 || sum.Rounds != 3 || sum.Held != 0 {
		t.Fatalf("%+v %v", sum, err)
	}
	cmd := exec.Command(simBin, "agentd", "--fleet-file", "../../deploy/examples/fleet.yaml", "--robot", "1",
		"--nats", "nats://127.0.0.1:1", "--creds", "", "--tls-ca", "", "--gossip-key-file", "", "--connect-timeout", "1s")
	b, err := cmd.CombinedOutput()
	if err == nil || !strings.Contains(string(b), "cannot reach NATS at nats://127.0.0.1:1") {
		t.Fatalf("agentd with the fleet file and --nats: %v\n%s", err, b)
	}
}
