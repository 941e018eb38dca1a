package cli

import (
	"encoding/json"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
)

var simBin string

// The command is tested as a user runs it: a built binary, real files.
func TestMain(m *testing.M) {
	dir, err := os.MkdirTemp("", "sim-test")
	if err != nil {
		panic(err)
	}
	simBin = filepath.Join(dir, "sim")
	if out, err := exec.Command("go", "build", "-o", simBin, "..").CombinedOutput(); err != nil {
		panic("building sim: " + err.Error() + "\n" + string(out))
	}
	code := m.Run()
	os.RemoveAll(dir)
	os.Exit(code)
}

func runSim(t *testing.T, args ...string) (stdout, stderr string, code int) {
	t.Helper()
	cmd := exec.Command(simBin, args...)
	var o, e strings.Builder
	cmd.Stdout, cmd.Stderr = &o, &e
	err := cmd.Run()
	code = 0
	if ee, ok := err.(*exec.ExitError); ok {
		code = ee.ExitCode()
	} else if err != nil {
		t.Fatal(err)
	}
	return o.String(), e.String(), code
}

func TestCompareJSON(t *testing.T) {
	out, errOut, code := runSim(t, "compare", "--scenario", "harbor", "--robots", "3", "--episodes", "3",
		"--seed", "7", "--samples", "4", "--horizon", "8", "--json")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errOut)
	}
	if errOut != "" {
		t.Errorf("no progress bar into a pipe, got stderr %q", errOut)
	}
	var rep struct {
		Scenario string `json:"scenario"`
		Robots   int    `json:"robots"`
		Policies []struct {
			Name  string   `json:"name"`
			Mean  *float64 `json:"mean_cost"`
			CI    *float64 `json:"ci95"`
			Steps *float64 `json:"mean_steps"`
			Q     *float64 `json:"qfactors_per_decision"`
			Ms    *float64 `json:"ms_per_decision"`
		} `json:"policies"`
	}
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatalf("not JSON: %v\n%s", err, out)
	}
	if rep.Scenario != "harbor" || rep.Robots != 3 || len(rep.Policies) != 3 {
		t.Fatalf("unexpected report %s", out)
	}
	names := []string{"base", "all-at-once", "one-at-a-time"}
	for i, p := range rep.Policies {
		if p.Name != names[i] || p.Mean == nil || p.CI == nil || p.Steps == nil || p.Q == nil || p.Ms == nil {
			t.Errorf("policy %d incomplete: %+v", i, p)
		}
	}
}

func TestCompareTable(t *testing.T) {
	out, errOut, code := runSim(t, "compare", "--scenario", "upkeep", "--robots", "2", "--episodes", "2",
		"--samples", "2", "--horizon", "4", "--policies", "base,one-at-a-time")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errOut)
	}
	for _, want := range []string{"upkeep, 2 robots, 2 episodes", "mean cost", "95% CI", "one-at-a-time"} {
		if !strings.Contains(out, want) {
			t.Errorf("table lacks %q:\n%s", want, out)
		}
	}
}

func TestExactJSON(t *testing.T) {
	for _, sc := range []string{"harbor", "upkeep"} {
		checkExact(t, sc)
	}
}

func checkExact(t *testing.T, scenario string) {
	out, errOut, code := runSim(t, "exact", "--scenario", scenario, "--config", "../../deploy/examples/"+scenario+"-tiny.yaml", "--json")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errOut)
	}
	var r map[string]float64
	if err := json.Unmarshal([]byte(out), &r); err != nil {
		t.Fatalf("not JSON: %v\n%s", err, out)
	}
	// Optimal <= each rollout <= base: the cost improvement property
	// (arXiv:1910.00120) and the definition of the optimum.
	if !(r["optimal"] <= r["one_at_a_time"]+1e-9 && r["optimal"] <= r["all_at_once"]+1e-9 &&
		r["one_at_a_time"] <= r["base"]+1e-9 && r["all_at_once"] <= r["base"]+1e-9 && r["states"] > 0) {
		t.Fatalf("exact report out of order: %s", out)
	}
}

func TestUserErrors(t *testing.T) {
	dir := t.TempDir()
	bad := filepath.Join(dir, "bad.yaml")
	os.WriteFile(bad, []byte("width: 5\nheight: 5\ndock: [7, 1]\n"), 0o644)
	big := filepath.Join(dir, "big.yaml")
	os.WriteFile(big, []byte("width: 6\nheight: 6\nrobots: 3\nslicks: 3\ndiscount: 0.9\nslick_cells: [[5,5],[0,5],[5,0]]\n"), 0o644)
	undiscounted := filepath.Join(dir, "undisc.yaml")
	os.WriteFile(undiscounted, []byte("width: 2\nheight: 2\nrobots: 1\nslick_cells: [[1,1]]\n"), 0o644)
	cases := []struct {
		args []string
		want string
	}{
		{[]string{"compare", "--scenario", "pond"}, `unknown scenario "pond" (known: harbor, upkeep)`},
		{[]string{"compare", "--config", bad}, bad + ":3: dock: cell (7,1) is outside the 5 x 5 grid"},
		{[]string{"compare", "--config", filepath.Join(dir, "missing.yaml")}, "missing.yaml: no such file"},
		{[]string{"compare", "--episodes", "0"}, "--episodes must be at least 1"},
		{[]string{"compare", "--order", "0,x"}, `--order: "x" is not a robot number`},
		{[]string{"compare", "--bogus"}, "flag provided but not defined: -bogus"},
		{[]string{"exact", "--scenario", "harbor"}, "--config FILE is required"},
		{[]string{"exact", "--scenario", "harbor", "--config", big, "--max-states", "500"}, "more than 500 states"},
		{[]string{"exact", "--scenario", "harbor", "--config", undiscounted}, "exact costs need a discount below 1"},
		{[]string{"fly"}, `unknown command "fly"`},
		// Out-of-range values are refused naming the flag, never turned
		// into defaults.
		{[]string{"compare", "--robots", "0"}, `invalid value "0" for flag -robots`},
		{[]string{"fleet", "--robots", "0"}, `invalid value "0" for flag -robots`},
		{[]string{"compare", "--samples", "0"}, "--samples 0: want 1..4096"},
		{[]string{"fleet", "--samples", "0"}, "--samples 0: want 1..4096"},
		{[]string{"fleet", "--samples", "5000"}, "--samples 5000: want 1..4096"},
		{[]string{"compare", "--horizon", "-1"}, "--horizon -1: want 0..1000"},
		{[]string{"fleet", "--rounds", "0"}, "--rounds 0: want at least 1"},
		{[]string{"fleet", "--turn-deadline", "0s"}, "--turn-deadline 0s"},
		{[]string{"fleet", "--mode", "fast"}, `invalid value "fast" for flag -mode`},
		{[]string{"fleet", "--guess", "psychic"}, `--guess "psychic"`},
		{[]string{"fleet", "--order", "0,0"}, "--order 0,0: want distinct robot ids"},
		{[]string{"fleet", "--hop", "1ms"}, "--hop models the virtual fleet's links or compute: add --virtual"},
		{[]string{"fleet", "--virtual", "--loss", "2"}, "--loss 2: want a probability in [0, 1]"},
		{[]string{"coordinator", "--samples", "99999"}, "--samples 99999: want 1..4096"},
		{[]string{"coordinator", "--report-wait", "0s"}, "--report-wait 0s"},
		{[]string{"agentd", "--robot", "0", "--stale", "0s"}, "--stale 0s"},
		{[]string{"agentd", "--robot", "9"}, "--robot 9: this fleet has robots 0..3"},
	}
	for _, c := range cases {
		_, errOut, code := runSim(t, c.args...)
		if code == 0 || !strings.Contains(errOut, c.want) || strings.Contains(errOut, "panic") {
			t.Errorf("sim %v: exit %d, stderr %q, want it to contain %q", c.args, code, errOut, c.want)
		}
	}
}

func TestHelp(t *testing.T) {
	out, _, code := runSim(t, "help")
	if code != 0 || !strings.Contains(out, "compare") || !strings.Contains(out, "exact") {
		t.Fatalf("help: %d %q", code, out)
	}
	_, errOut, code := runSim(t, "compare", "-h")
	if code != 0 || !strings.Contains(errOut, "--episodes") && !strings.Contains(errOut, "-episodes") {
		t.Fatalf("compare -h: %d %q", code, errOut)
	}
}

// The two forms of sim fleet, real processes over NATS and the virtual-time
// fleet, decide exactly alike for the same flags: the same digest.
func TestVirtualMatchesReal(t *testing.T) {
	digest := func(args ...string) (string, map[string]any) {
		t.Helper()
		out, errOut, code := runSim(t, append([]string{"fleet", "--scenario", "upkeep", "--robots", "3", "--rounds", "15",
			"--seed", "8", "--samples", "4", "--horizon", "6", "--json"}, args...)...)
		if code != 0 {
			t.Fatalf("sim fleet %v: exit %d: %s", args, code, errOut)
		}
		var sum map[string]any
		if err := json.Unmarshal([]byte(out), &sum); err != nil {
			t.Fatalf("%v: %s", err, out)
		}
		d, _ := sum["decisions_sha256"].(string)
		if len(d) != 64 || sum["rounds"] != 15.0 || sum["robot_rounds_held"] != 0.0 {
			t.Fatalf("summary %s", out)
		}
		return d, sum
	}
	real, _ := digest()
	virtual, sum := digest("--virtual", "--jitter", "3ms")
	if real != virtual {
		t.Fatalf("real fleet %s, virtual %s", real, virtual)
	}
	if sum["virtual"] != true || sum["rounds_per_second"].(float64) <= 0 {
		t.Fatalf("virtual summary %v", sum)
	}
	// Another seed decides otherwise: the digest tells runs apart.
	if other, _ := digest("--virtual", "--seed", "9"); other == real {
		t.Fatal("different seeds, same digest")
	}
}

// The latency benchmark runs end to end and reports every row (figures are
// for the note, not asserted: this machine's timing is noisy).
func TestBenchRounds(t *testing.T) {
	out, errOut, code := runSim(t, "bench", "rounds", "--robots", "2,3", "--rounds", "3", "--hops", "20", "--compute", "1ms", "--json")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errOut)
	}
	var rep struct {
		Hop  float64 `json:"hop_us"`
		Rows []struct {
			Robots  int     `json:"robots"`
			Mode    string  `json:"mode"`
			Round   float64 `json:"round_us"`
			Compute float64 `json:"compute_us"`
			Ratio   float64 `json:"overhead_ratio"`
		} `json:"rows"`
	}
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatalf("%v\n%s", err, out)
	}
	if rep.Hop <= 0 || len(rep.Rows) != 4 {
		t.Fatalf("report %s", out)
	}
	for _, r := range rep.Rows {
		// A sequential round cannot beat its robots' computes done one
		// after another, and a stubbed compute sleeps at least the 1 ms
		// asked for. (Not the mean compute: one long sleep raises the mean
		// above what the median round needed.)
		if r.Mode == "sequential" && r.Round < float64(r.Robots)*1000 {
			t.Errorf("sequential round of %d robots took %.0fus, less than %d computes of 1ms", r.Robots, r.Round, r.Robots)
		}
	}
}

func TestTrain(t *testing.T) {
	out := filepath.Join(t.TempDir(), "h.gm")
	args := []string{"train", "--scenario", "harbor", "--robots", "3", "--episodes", "6", "--eval-episodes", "3",
		"--iterations", "2", "--samples", "3", "--horizon", "5", "--epochs", "5", "--out", out, "--json"}
	stdout, errOut, code := runSim(t, args...)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errOut)
	}
	var rep struct {
		Iterations []struct {
			Iteration   int     `json:"iteration"`
			LearnedCost float64 `json:"learned_cost"`
			Accuracy    float64 `json:"test_accuracy"`
			ModelBytes  int     `json:"model_bytes"`
		} `json:"iterations"`
		Saved   int    `json:"saved_iteration"`
		Version uint64 `json:"version"`
	}
	if err := json.Unmarshal([]byte(stdout), &rep); err != nil {
		t.Fatalf("%v\n%s", err, stdout)
	}
	if len(rep.Iterations) != 2 || rep.Version != 1 || rep.Saved < 1 || rep.Iterations[0].ModelBytes == 0 {
		t.Fatalf("report %s", stdout)
	}
	// Training again over the file writes the next version.
	stdout, _, code = runSim(t, args...)
	if err := json.Unmarshal([]byte(stdout), &rep); code != 0 || err != nil || rep.Version != 2 {
		t.Fatalf("second run: exit %d version %d", code, rep.Version)
	}
	// The same seed trains the same model, byte for byte.
	again := filepath.Join(t.TempDir(), "h.gm")
	a2 := append(append([]string{}, args[:len(args)-3]...), "--out", again, "--version", "2", "--json")
	if _, e, c := runSim(t, a2...); c != 0 {
		t.Fatalf("%s", e)
	}
	b1, _ := os.ReadFile(out)
	b2, _ := os.ReadFile(again)
	if string(b1) != string(b2) {
		t.Fatal("same seed, different model files")
	}
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"train", "--episodes", "1"}, "--episodes must be at least 2"},
		{[]string{"train", "--hidden", "8,8,8"}, "at most two layers"},
		{[]string{"train", "--out", t.TempDir()}, "is a directory"},
		{[]string{"train", "--test-frac", "1.5"}, "--test-frac must be between 0 and 1"},
	} {
		if _, e, code := runSim(t, c.args...); code == 0 || !strings.Contains(e, c.want) {
			t.Errorf("sim %v: %d %q, want %q", c.args, code, e, c.want)
		}
	}
}

// The search benchmark runs every configuration and reports each with a
// positive time and, where a speed-up is off, its ratio to the full search
// (figures are for the note, not asserted: this machine's timing is
// noisy). Bad flags are refused.
func TestBenchSearch(t *testing.T) {
	out, errOut, code := runSim(t, "bench", "search", "--blocks", "1", "--block", "20ms", "--json")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errOut)
	}
	var rep struct {
		Wake float64 `json:"goroutine_wake_us"`
		Rows []struct {
			Name   string  `json:"name"`
			Us     float64 `json:"us_per_op"`
			Ns     float64 `json:"ns_per_robot_step"`
			VsFull float64 `json:"time_vs_full"`
		} `json:"rows"`
	}
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatalf("%v\n%s", err, out)
	}
	if len(rep.Rows) != 10 || rep.Wake <= 0 {
		t.Fatalf("%d rows: %s", len(rep.Rows), out)
	}
	for i, r := range rep.Rows {
		if r.Us <= 0 || r.Ns <= 0 || (i > 0 && r.Name != rep.Rows[0].Name && strings.Contains(r.Name, ", no ") && r.VsFull <= 0) {
			t.Fatalf("row %+v", r)
		}
	}
	for _, bad := range [][]string{{"--blocks", "0"}, {"--block", "0s"}, {"--blocks", "x"}} {
		if _, errOut, code := runSim(t, append([]string{"bench", "search"}, bad...)...); code == 0 {
			t.Fatalf("%v accepted: %s", bad, errOut)
		}
	}
}
