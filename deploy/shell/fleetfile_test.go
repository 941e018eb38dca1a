package shell

import (
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"baton/sim/config"
)

// The shipped example loads, and each role gets its own flags, paths
// resolved against the file's directory.
func TestFleetFileExample(t *testing.T) {
	f, err := LoadFleetFile("../examples/fleet.yaml")
	if err != nil {
		t.Fatal(err)
	}
	site, _ := filepath.Abs("../../sim/upkeep/sites/solar-park.yaml")
	for _, c := range []struct {
		role   string
		robot  int
		want   []string
		absent []string
	}{
		{RoleCoordinator, -1, []string{"--fleet=park-east", "--scenario=upkeep", "--robots=4", "--starts=depot;depot;gate;gate",
			"--nats=nats://nats-a:4222,nats://nats-b:4222,nats://nats-c:4222", "--creds=/etc/baton/creds/coordinator.nk",
			"--mode=hybrid", "--turn-deadline=200ms", "--log-replicas=3", "--decision-log=/var/lib/baton/decisions.jsonl", "--http=127.0.0.1:7480"},
			[]string{"--stale=10s", "--join=coordinator-host:7946"}},
		{RoleAgentd, 3, []string{"--creds=/etc/baton/creds/robot-3.nk", "--join=coordinator-host:7946", "--robot-name=ranger-east",
			"--stale=10s", "--gossip=0.0.0.0:7946", "--gossip-key-file=/etc/baton/gossip.key"},
			[]string{"--mode=hybrid", "--decision-log=/var/lib/baton/decisions.jsonl"}},
		{RoleSim, -1, []string{"--scenario=upkeep", "--robots=4", "--mode=hybrid", "--period=2s"}, []string{"--nats=nats://nats-a:4222,nats://nats-b:4222,nats://nats-c:4222"}},
	} {
		args, err := f.Args(c.role, c.robot)
		if err != nil {
			t.Fatal(err)
		}
		var config string
		for _, a := range args {
			if v, ok := strings.CutPrefix(a, "--config="); ok {
				config, _ = filepath.Abs(v)
			}
		}
		if config != site {
			t.Errorf("%s: --config %q, want the site file %q", c.role, config, site)
		}
		for _, w := range c.want {
			if !slices.Contains(args, w) {
				t.Errorf("%s: no %s in %v", c.role, w, args)
			}
		}
		for _, a := range c.absent {
			if slices.Contains(args, a) {
				t.Errorf("%s: %s is not its flag: %v", c.role, a, args)
			}
		}
	}
}

// The file's flags come first, the command line's after (so they win), and
// --fleet-file itself is taken out; agentd needs --robot.
func TestExpandFleetFile(t *testing.T) {
	args, err := ExpandFleetFile([]string{"--robot", "2", "--fleet-file=../examples/fleet.yaml", "--stale", "3s"}, RoleAgentd)
	if err != nil {
		t.Fatal(err)
	}
	file := slices.Index(args, "--stale=10s")
	cli := slices.Index(args, "3s")
	if file < 0 || cli < file || slices.ContainsFunc(args, func(a string) bool { return strings.Contains(a, "fleet-file") }) ||
		!slices.Contains(args, "--robot") || !slices.Contains(args, "--robot-name=ranger-west") {
		t.Fatalf("%v", args)
	}
	if _, err := ExpandFleetFile([]string{"-fleet-file", "../examples/fleet.yaml"}, RoleAgentd); err == nil || !strings.Contains(err.Error(), "--robot") {
		t.Fatalf("agentd without --robot: %v", err)
	}
	if _, err := ExpandFleetFile([]string{"--fleet-file", "../examples/fleet.yaml", "--robot", "9"}, RoleAgentd); err == nil ||
		!strings.Contains(err.Error(), "robot 9 is not in the fleet file") {
		t.Fatalf("robot 9: %v", err)
	}
	if _, err := ExpandFleetFile([]string{"--fleet-file", "../examples/fleet.yaml", "--robots", "3"}, RoleSim); err == nil ||
		!strings.Contains(err.Error(), "--robots 3 conflicts with --fleet-file ../examples/fleet.yaml, which lists 4 robots") {
		t.Fatalf("a conflicting robot count: %v", err)
	}
	if args, err := ExpandFleetFile([]string{"--fleet-file", "../examples/fleet.yaml", "--robots=4"}, RoleSim); err != nil || !slices.Contains(args, "--robots=4") {
		t.Fatalf("the file's own robot count: %v %v", args, err)
	}
	if _, err := ExpandFleetFile([]string{"--fleet-file", "a.yaml", "--fleet-file=b.yaml"}, RoleSim); err == nil || !strings.Contains(err.Error(), "given 2 times") {
		t.Fatalf("two files: %v", err)
	}
	if args, _ := ExpandFleetFile([]string{"--rounds", "3"}, RoleSim); !slices.Equal(args, []string{"--rounds", "3"}) {
		t.Fatalf("without a file: %v", args)
	}
}

// Bad fleet files are refused with FILE:LINE: FIELD.
func TestFleetFileErrors(t *testing.T) {
	dir := t.TempDir()
	for _, c := range []struct{ name, text, want string }{
		{"no fleet", "scenario: harbor\nrobots: [{id: 0}]\n", ":1: fleet: required"},
		{"unknown scenario", "fleet: a\nscenario: orchard\nrobots: [{id: 0}]\n", `:2: scenario: unknown scenario "orchard"`},
		{"no robots", "fleet: a\nscenario: harbor\n", "robots: list every robot"},
		{"id twice", "fleet: a\nscenario: harbor\nrobots:\n  - {id: 0}\n  - {id: 0}\n", ":5: robots[1].id: robot id 0 listed twice"},
		{"id out of range", "fleet: a\nscenario: harbor\nrobots:\n  - {id: 4}\n", ":4: robots[0].id: robot id 4: ids are 0..0"},
		{"name twice", "fleet: a\nscenario: harbor\nrobots:\n  - {id: 0, name: x}\n  - {id: 1, name: x}\n", `robots[1].name: name "x" given to two robots`},
		{"some starts", "fleet: a\nscenario: harbor\nrobots:\n  - {id: 0, start: \"1,1\"}\n  - {id: 1}\n", "1 of 2 robots give a start position"},
		{"bad duration", "fleet: a\nscenario: harbor\nrobots: [{id: 0}]\nrounds:\n  period: soon\n", `:5: rounds.period: "soon" is not a duration`},
		{"bad mode", "fleet: a\nscenario: harbor\nrobots: [{id: 0}]\nrounds: {mode: relay}\n", `rounds.mode: "relay"`},
		{"unknown field", "fleet: a\nscenario: harbor\nrobot: [{id: 0}]\n", `:3: unknown field "robot"`},
		{"not yaml", "fleet: [\n", "fleet.yaml"},
		{"missing site file", "fleet: a\nscenario: harbor\nsite: nowhere.yaml\nrobots: [{id: 0}]\n", ":3: site: " + filepath.Join(dir, "nowhere.yaml") + ": no such file"},
		{"missing model", "fleet: a\nscenario: harbor\nrobots: [{id: 0}]\nguess: {source: learned, model: m.gm}\n", "guess.model: "},
	} {
		path := filepath.Join(dir, "fleet.yaml")
		os.WriteFile(path, []byte(c.text), 0o600)
		_, err := LoadFleetFile(path)
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: %v, want %q", c.name, err, c.want)
		}
	}
	if _, err := LoadFleetFile(filepath.Join(dir, "none.yaml")); err == nil {
		t.Error("a missing file loaded")
	}
}

// No fleet file panics or allocates beyond the YAML loader's bound.
func FuzzFleetFile(f *testing.F) {
	ex, _ := os.ReadFile("../examples/fleet.yaml")
	f.Add(ex)
	f.Add([]byte("fleet: a\nscenario: harbor\nrobots: [{id: 0, start: \"1,1\"}]\nrounds: {period: 1s}\n"))
	f.Fuzz(func(t *testing.T, data []byte) {
		if len(data) > config.MaxFileBytes {
			return
		}
		var ff FleetFile
		doc, err := config.Parse("fleet.yaml", data, &ff)
		if err != nil {
			return
		}
		if ff.check(doc) == nil && len(ff.Robots) > 0 {
			if _, err := ff.Args(RoleAgentd, ff.Robots[0].ID); err != nil {
				t.Fatal(err)
			}
		}
	})
}
