package cli

import (
	"encoding/json"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"baton/coordinator/clock"
	"baton/coordinator/hub"
	"baton/coordinator/view"
	"baton/deploy/shell"
	"baton/sim/fuzzcheck"
	"baton/sim/harbor"
	"baton/sim/model"
)

// Replaying a fleet's durable log reproduces the cost the world charged,
// to the last bit, and `sim replay --json` says the same from the export.
func TestReplayReproducesFleetCost(t *testing.T) {
	f := testFleet(t, opts("harbor", 3, 200, 6, nil))
	var cost float64
	for r := 1; r <= 12; r++ {
		res := f.play(r)
		if res.Held != 0 {
			t.Fatalf("round %d: %d held", r, res.Held)
		}
		cost += res.Cost
	}
	record(t, f, 12) // round 12's reports are filed
	res, err := f.replay()
	if err != nil {
		t.Fatal(err)
	}
	if res.Rounds < 12 || res.First != 1 || !res.Continuous() || res.MaxDiff != 0 {
		t.Fatalf("%s, max difference %g", res.Summary(), res.MaxDiff)
	}
	if sum := res.costOf(12); sum != cost {
		t.Fatalf("replayed cost of rounds 1-12 %.17g, the world charged %.17g", sum, cost)
	}
	out, err := exec.Command(simBin, "replay", "--file", f.durableLog(), "--scenario", "harbor", "--robots", "3", "--json").Output()
	if err != nil {
		t.Fatalf("sim replay: %v\n%s", err, out)
	}
	var got replayResult
	if err := json.Unmarshal(out, &got); err != nil {
		t.Fatal(err)
	}
	if got.Cost != res.Cost || got.Rounds != res.Rounds || len(got.Runs) != 1 {
		t.Fatalf("sim replay --json: cost %g over %d rounds, want %g over %d", got.Cost, got.Rounds, res.Cost, res.Rounds)
	}
}

// replayFixture is a valid 3-boat log of n rounds of one run.
func replayFixture(t testing.TB, n int) (model.Fleet, string, []hub.Line) {
	m, err := harbor.Default(3)
	if err != nil {
		t.Fatal(err)
	}
	digest, err := shell.Digest("harbor", "", 3)
	if err != nil {
		t.Fatal(err)
	}
	x := m.NewState()
	m.Start(x, model.NewRNG(1).Rand)
	var lines []hub.Line
	for r := 1; r <= n; r++ {
		ints, reals := m.Flatten(x, nil, nil)
		u := []int{1, 2, 0}
		rec := clock.Record{Epoch: 7, Round: uint64(r), Scenario: "harbor", Digest: digest, Controls: u, Applied: u, Held: []int{},
			Snapshot: &clock.StateWire{Ints: ints, Reals: reals}}
		closed := rec
		closed.Applied = nil
		rec.Stage = m.Advance(x, u)
		lines = append(lines, hub.Line{Record: closed, Kind: shell.JournalClosed}, hub.Line{Record: rec})
	}
	return m, digest, lines
}

func writeLines(t *testing.T, lines []hub.Line, extra ...string) string {
	t.Helper()
	var b strings.Builder
	for _, l := range lines {
		j, _ := json.Marshal(l)
		b.Write(append(j, '\n'))
	}
	for _, e := range extra {
		b.WriteString(e + "\n")
	}
	path := filepath.Join(t.TempDir(), "log.jsonl")
	if err := os.WriteFile(path, []byte(b.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	return path
}

// Bad logs get a message naming what is wrong and where; a log with a
// missing or doubled round is refused as not continuous.
func TestReplayBadLogs(t *testing.T) {
	_, _, good := replayFixture(t, 4)
	bad := func(edit func(l []hub.Line) []hub.Line) []hub.Line {
		cp := make([]hub.Line, len(good))
		for i, l := range good {
			cp[i] = l
			cp[i].Controls = append([]int(nil), l.Controls...)
			cp[i].Applied = append([]int(nil), l.Applied...)
		}
		return edit(cp)
	}
	cases := []struct {
		name  string
		path  string
		flags []string
		want  string
	}{
		{"not JSON", writeLines(t, good, "{not json"), nil, "line 9"},
		{"no round", writeLines(t, good, `{"epoch":7}`), nil, "line 9: no round number"},
		{"unknown kind", writeLines(t, good, `{"epoch":7,"round":5,"kind":"opened"}`), nil, `unknown record kind "opened"`},
		{"other scenario", writeLines(t, good), []string{"--robots", "4"}, "scenario digest"},
		{"control out of range", writeLines(t, bad(func(l []hub.Line) []hub.Line { l[3].Applied[1] = 99; return l })), nil, "round 2 (run 7): robot 1: control 99 out of range"},
		{"missing round", writeLines(t, bad(func(l []hub.Line) []hub.Line { return append(l[:2], l[4:]...) })), nil, "missing rounds [2]"},
		{"doubled round", writeLines(t, bad(func(l []hub.Line) []hub.Line {
			d := l[2]
			d.Epoch = 8
			return append(l, d)
		})), nil, "doubled rounds [2]"},
		{"missing file", "/nonexistent/log.jsonl", nil, "no such file"},
	}
	for _, c := range cases {
		args := append([]string{"replay", "--file", c.path, "--scenario", "harbor", "--robots", "3"}, c.flags...)
		out, err := exec.Command(simBin, args...).CombinedOutput()
		if err == nil || !strings.Contains(string(out), c.want) {
			t.Errorf("%s: %v, want an error with %q:\n%s", c.name, err, c.want, out)
		}
	}
	out, err := exec.Command(simBin, "replay", "--file", writeLines(t, good), "--scenario", "harbor", "--robots", "3").CombinedOutput()
	if err != nil || !strings.Contains(string(out), "rounds 1-4 in 1 run(s), no gap, no doubled round") {
		t.Fatalf("good log: %v\n%s", err, out)
	}
	if out, err := exec.Command(simBin, "replay", "--scenario", "harbor").CombinedOutput(); err == nil || !strings.Contains(string(out), "give --file or --nats") {
		t.Fatalf("no source: %v\n%s", err, out)
	}
}

// A round written ahead at its close and never filed (the coordinator died
// before the reports) is still a round of the episode, costed as decided.
func TestReplayClosedNotFiled(t *testing.T) {
	m, digest, lines := replayFixture(t, 3)
	lines = lines[:len(lines)-1] // round 3's filed record never came
	res, err := assemble(lines, m, digest)
	if err != nil {
		t.Fatal(err)
	}
	if res.Rounds != 3 || !res.Continuous() || res.Runs[0].Unfiled != 1 || res.MaxDiff != 0 {
		t.Fatalf("%s %+v", res.Summary(), res.Runs)
	}
}

// Every decision-log record a file or stream can hold goes through one
// decoder; none panics, and none costs more than its line's size in memory
// many times over.
func FuzzReplayLine(f *testing.F) {
	m, digest, lines := replayFixture(f, 2)
	for _, l := range lines {
		b, _ := json.Marshal(l)
		f.Add(b)
	}
	f.Add([]byte(`{"round":1,"state":{"ints":[-1,99999999]},"controls":[0,0,0]}`))
	f.Add([]byte(`{"round":1,"kind":"closed","controls":[1e9]}`))
	f.Fuzz(func(t *testing.T, data []byte) {
		if len(data) > shell.MaxJournalRecord {
			return
		}
		var err error
		used := fuzzcheck.Allocated(func() {
			var l hub.Line
			if l, err = parseLogLine(data); err == nil {
				if _, err = assemble([]hub.Line{l}, m, digest); err == nil {
					_, err = view.FrameOf(m, l.Record) // the replay page draws what replays
				}
			}
		})
		// JSON decoding into slices: a few times the input, plus the
		// scenario's state (a few kB).
		if bound := uint64(16*len(data)) + 1<<16; used > bound {
			t.Fatalf("%d bytes allocated for a %d-byte record (bound %d): %v", used, len(data), bound, err)
		}
	})
}

// sim fleet --true-wear reports upkeep's true cost beside the expected one,
// and refuses a scenario whose state is the truth.
func TestFleetTrueWear(t *testing.T) {
	out, err := exec.Command(simBin, "fleet", "--scenario", "upkeep", "--robots", "3", "--rounds", "4", "--true-wear", "--json").Output()
	if err != nil {
		t.Fatalf("%v\n%s", err, out)
	}
	var sum struct {
		Cost     float64  `json:"cost"`
		TrueCost *float64 `json:"true_cost"`
		Kind     string   `json:"cost_kind"`
	}
	if err := json.Unmarshal(out, &sum); err != nil || sum.TrueCost == nil || *sum.TrueCost < 0 || !strings.Contains(sum.Kind, "true_cost") {
		t.Fatalf("%+v %v\n%s", sum, err, out)
	}
	b, err := exec.Command(simBin, "fleet", "--scenario", "harbor", "--rounds", "2", "--true-wear").CombinedOutput()
	if err == nil || !strings.Contains(string(b), "keeps no hidden truth") {
		t.Fatalf("harbor --true-wear: %v\n%s", err, b)
	}
}

// What the walk-through tripped over, as behaviour: --guess learned
// without a model is said on screen; help spells flags as the docs do
// (--name); every cost says what it is.
func TestWalkThroughFixes(t *testing.T) {
	b, err := exec.Command(simBin, "fleet", "--guess", "learned", "--rounds", "1", "--virtual", "--quiet").CombinedOutput()
	if err != nil || !strings.Contains(string(b), "warning: --guess learned without --guess-model") {
		t.Fatalf("learned without a model: %v\n%s", err, b)
	}
	for _, cmd := range [][]string{{"fleet", "-h"}, {"agentd", "-h"}, {"coordinator", "-h"}, {"replay", "-h"}} {
		b, _ := exec.Command(simBin, cmd...).CombinedOutput()
		if !strings.Contains(string(b), "\n  --") || strings.Contains(string(b), "\n  -r") {
			t.Errorf("sim %s help does not spell flags --name:\n%s", cmd[0], b)
		}
	}
	b, err = exec.Command(simBin, "compare", "--robots", "2", "--episodes", "2", "--samples", "2", "--horizon", "2", "--json").Output()
	var rep struct {
		CostKind string `json:"cost_kind"`
	}
	if err != nil || json.Unmarshal(b, &rep) != nil || !strings.Contains(rep.CostKind, "per episode") {
		t.Fatalf("compare's cost kind: %v %q", err, rep.CostKind)
	}
	b, err = exec.Command(simBin, "fleet", "--rounds", "1", "--virtual", "--json").Output()
	var sum struct {
		CostKind string `json:"cost_kind"`
	}
	if err != nil || json.Unmarshal(b, &sum) != nil || !strings.Contains(sum.CostKind, "undiscounted") {
		t.Fatalf("fleet's cost kind: %v %q", err, sum.CostKind)
	}
}
