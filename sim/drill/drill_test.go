package drill

import (
	"context"
	"math"
	"path/filepath"
	"reflect"
	"strings"
	"testing"

	"baton/sim/fault"
)

const small = `
name: small
scenario: harbor
robots: 4
rounds: 60
episodes: 3
seed: 5
samples: 6
horizon: 10
turn_deadline: 100ms
turn_time: 10ms
hop: 2ms
`

func parse(t *testing.T, text string) *Drill {
	t.Helper()
	d, err := Parse("drill.yaml", []byte(text))
	if err != nil {
		t.Fatal(err)
	}
	return d
}

// Bad drill files get errors naming the file, line and field.
func TestBadFiles(t *testing.T) {
	for _, c := range []struct{ name, extra, want string }{
		{"unknown fault", "faults:\n  - kind: gremlins\n", `drill.yaml:14: faults[0].kind: unknown fault "gremlins"`},
		{"probability", "faults:\n  - kind: loss\n    p: 1.5\n", "drill.yaml:15: faults[0].p: 1.5: a probability must be in [0,1]"},
		{"window past the end", "faults:\n  - kind: loss\n    p: 0.1\n    rounds: [10, 61]\n", "faults[0].rounds: [10 61]: past the drill's last round 60"},
		{"unknown robot", "faults:\n  - kind: slow\n    slow: 300ms\n    robots: [4]\n", "faults[0].robots[0]: unknown robot 4: the fleet has robots 0..3"},
		{"unknown robot in a partition", "faults:\n  - kind: partition\n    groups: [[0, 1], [2, 9]]\n", "faults[0].groups[1]: unknown robot 9"},
		{"nothing to sweep", "sweep:\n  rounds: [1, 5]\n", "drill.yaml:13: sweep: nothing to sweep"},
		{"sweep loss", "sweep:\n  loss: [0.2, 2]\n", "sweep.loss[1]: 2: a loss rate must be in [0,1]"},
		{"sweep mode", "sweep:\n  modes: [hybrid, telepathic]\n", `sweep.modes[1]: "telepathic"`},
		{"auto without a period", "sweep:\n  modes: [auto]\n", "sweep.modes: auto switches"},
		{"field of another kind", "faults:\n  - kind: loss\n    p: 0.1\n    slow: 1s\n", "faults[0].slow: does not apply to a loss fault"},
		{"kill without a round", "faults:\n  - kind: kill-robot\n    robots: [1]\n", "faults[0].rounds: kill-robot happens at one round"},
		{"unknown field", "colour: blue\n", "colour"},
		{"bursty", "sweep:\n  bursty: [{loss: 0.2, mean_burst: 0.5}]\n", "sweep.bursty[0].mean_burst"},
		{"delay distribution", "faults:\n  - kind: delay\n    delay: {mean: 5ms, dist: cauchy}\n", `faults[0].delay.dist: "cauchy"`},
		{"loss without p", "faults:\n  - kind: loss\n", "faults[0]: a loss fault needs p"},
		{"reorder without delay", "faults:\n  - kind: reorder\n    p: 0.5\n", "a reorder fault needs delay"},
		{"burst half given", "faults:\n  - kind: burst\n    p_bad_good: 0.5\n", "needs loss and mean_burst, or p_good_bad and p_bad_good"},
		{"burst both ways", "faults:\n  - kind: burst\n    loss: 0.2\n    mean_burst: 4\n    p_good_bad: 0.1\n", "not both"},
		{"self link", "faults:\n  - kind: loss\n    p: 0.5\n    links: [[1, 1]]\n", "links[0]: a link from robot 1 to itself"},
		{"kill nobody", "faults:\n  - kind: kill-robot\n    rounds: [3]\n", "a kill-robot fault needs robots"},
		{"robots on a server fault", "faults:\n  - kind: kill-nats\n    rounds: [3]\n    robots: [1]\n", "faults[0].robots: does not apply to a kill-nats fault"},
	} {
		_, err := Parse("drill.yaml", []byte(small+c.extra))
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: got %v, want %q", c.name, err, c.want)
		}
	}
	if _, err := Load(filepath.Join(t.TempDir(), "missing.yaml")); err == nil || !strings.Contains(err.Error(), "missing.yaml") {
		t.Errorf("missing file: %v", err)
	}
}

// The demo drill shipped for users parses, and sweeps what it says.
func TestDemoFileParses(t *testing.T) {
	d, err := Load("../../deploy/examples/drill-harbor.yaml")
	if err != nil {
		t.Fatal(err)
	}
	if len(d.Points) != 3*5*4 || d.Model.Robots() != 6 || d.Rounds != 200 {
		t.Fatalf("%d points, %d robots, %d rounds", len(d.Points), d.Model.Robots(), d.Rounds)
	}
	r, err := Load("../../deploy/examples/drill-restarts.yaml")
	if err != nil {
		t.Fatal(err)
	}
	if !r.Process() || len(r.Points) != 1 {
		t.Fatalf("the restarts drill: process %v, %d points", r.Process(), len(r.Points))
	}
}

// With no faults, hybrid rounds decide exactly what sequential rollout
// decides (turns have time to wait for every predecessor): retained is 1
// exactly, and the same seed replays to the same report.
func TestZeroFaultsIsSequentialAndReplays(t *testing.T) {
	d := parse(t, small+"sweep:\n  modes: [hybrid, parallel]\n  loss: [0, 0.3]\n")
	a, err := Run(context.Background(), d, Options{Workers: 2})
	if err != nil {
		t.Fatal(err)
	}
	h := a.Configs[0]
	if h.Mode != "hybrid" || h.Loss != 0 || h.Retained != 1 || h.RetainedCI95 != 0 || h.MeanCost != a.SequentialCost || h.GuessedShare != 0 || h.HeldRounds != 0 {
		t.Fatalf("hybrid without faults: %+v (sequential %v)", h, a.SequentialCost)
	}
	if a.BaseCost <= a.SequentialCost {
		t.Fatalf("base %v, sequential %v: rollout should improve on base here", a.BaseCost, a.SequentialCost)
	}
	lossy := a.Configs[1]
	if lossy.Dropped == 0 || lossy.Loss != 0.3 {
		t.Fatalf("loss 0.3 dropped nothing: %+v", lossy)
	}
	b, err := Run(context.Background(), d, Options{Workers: 1})
	if err != nil {
		t.Fatal(err)
	}
	a.WallSeconds, b.WallSeconds = 0, 0
	if !reflect.DeepEqual(a, b) {
		t.Fatal("the same drill and seed gave different reports")
	}
	for _, c := range a.Configs {
		if math.IsNaN(c.MeanCost) || len(c.EpisodeCosts) != d.Episodes || len(c.PerRobot) != 4 {
			t.Fatalf("%+v", c)
		}
	}
}

// Process faults need real processes: without a runner the drill says so.
func TestProcessFaultsNeedARunner(t *testing.T) {
	d := parse(t, small+"faults:\n  - kind: kill-nats\n    rounds: [5]\n    down: 1s\n")
	if !d.Process() {
		t.Fatal("kill-nats is a process fault")
	}
	if _, err := Run(context.Background(), d, Options{}); err == nil || !strings.Contains(err.Error(), "real processes") {
		t.Fatalf("%v", err)
	}
}

// The automatic switch is measured against the drill's degraded window.
func TestAutoSwitchIsMeasured(t *testing.T) {
	d := parse(t, small+`period: 100ms
faults:
  - kind: delay
    rounds: [10, 18]
    delay: {fixed: 40ms}
sweep:
  modes: [auto]
`)
	rep, err := Run(context.Background(), d, Options{Workers: 2})
	if err != nil {
		t.Fatal(err)
	}
	c := rep.Configs[0]
	if c.ParallelRounds == 0 || c.SwitchAfter < 0 || c.SwitchAfter > 2 || c.SwitchBackAfter < 1 || c.SwitchBackAfter > 8 {
		t.Fatalf("parallel rounds %d, switched after %d rounds, back after %d", c.ParallelRounds, c.SwitchAfter, c.SwitchBackAfter)
	}
	t.Logf("auto: %d parallel rounds of %d; switched %d rounds after the links degraded, back %d rounds after they recovered",
		c.ParallelRounds, d.Rounds*d.Episodes, c.SwitchAfter, c.SwitchBackAfter)
	if fs := d.Faults; len(fs) != 1 || fs[0].Kind != fault.Delay {
		t.Fatal(fs)
	}
}
