package upkeep

import (
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
)

// lines joins YAML lines so a case's line numbers can be read off its index.
func lines(ls ...string) string { return strings.Join(ls, "\n") + "\n" }

// valid is the smallest file every malformed case departs from:
// line 1 levels, 2 level_cost, 3 sites, 4-6 sites a b c, 7 roads, 8-9 roads.
func valid(replace map[int]string, extra ...string) string {
	ls := []string{
		"levels: 2",
		"level_cost: [0, 1, 5]",
		"sites:",
		"  - {name: a}",
		"  - {name: b}",
		"  - {name: c}",
		"roads:",
		"  - [a, b]",
		"  - [b, c]",
	}
	for i, l := range replace {
		ls[i-1] = l
	}
	return lines(append(ls, extra...)...)
}

// chainCase puts site b's chain rows, block style, on lines 9, 10, 11.
func chainCase(rows ...string) string {
	ls := []string{"levels: 2", "level_cost: [0, 1, 5]", "roads:", "  - [a, b]", "sites:", "  - {name: a}", "  - name: b", "    chain:"}
	for _, r := range rows {
		ls = append(ls, "      - "+r)
	}
	return lines(ls...)
}

func TestValidBaseParses(t *testing.T) {
	m, err := Parse("f.yaml", []byte(valid(nil)), 0)
	if err != nil {
		t.Fatal(err)
	}
	if m.NumSites() != 3 || m.Robots() != 1 || m.Levels() != 2 || m.Discount() != 0.95 || m.Horizon() != 100 || m.ObserveAll() {
		t.Errorf("defaults not applied: sites %d robots %d L %d a %g H %d all %v",
			m.NumSites(), m.Robots(), m.Levels(), m.Discount(), m.Horizon(), m.ObserveAll())
	}
	if m.threshLevel != 1 || m.threshProb != 0.3 || m.Transition(0, 0, 1) != 0.05 {
		t.Errorf("defaults: T %d prob %g wear %g", m.threshLevel, m.threshProb, m.Transition(0, 0, 1))
	}
}

func TestMalformedFiles(t *testing.T) {
	cases := []struct {
		name string
		src  string
		want string
	}{
		{"unknown key", valid(nil, "colour: red"), "f.yaml:10: unknown field \"colour\""},
		{"unknown site key", valid(map[int]string{5: "  - {name: b, hue: 3}"}), "f.yaml:5: unknown field \"hue\""},
		{"wrong type", valid(map[int]string{1: "levels: many"}), "f.yaml:1: cannot read the text"},
		{"levels missing", valid(map[int]string{1: "horizon: 5"}), "f.yaml:1: levels: missing"},
		{"levels 0", valid(map[int]string{1: "levels: 0"}), "f.yaml:1: levels: must be between 1 and 8, got 0"},
		{"levels 9", valid(map[int]string{1: "levels: 9"}), "f.yaml:1: levels: must be between 1 and 8, got 9"},
		{"cost length", valid(map[int]string{2: "level_cost: [0, 1]"}), "f.yaml:2: level_cost: has 2 entries, want levels+1 = 3"},
		{"negative cost", valid(map[int]string{2: "level_cost: [0, -1, 5]"}), "f.yaml:2: level_cost[1]: must be a finite cost >= 0, got -1"},
		{"infinite cost", valid(map[int]string{2: "level_cost: [0, 1, .inf]"}), "f.yaml:2: level_cost[2]: must be a finite cost >= 0, got +Inf"},
		{"nan cost", valid(map[int]string{2: "level_cost: [.nan, 1, 5]"}), "f.yaml:2: level_cost[0]: must be a finite cost >= 0, got NaN"},
		{"wear > 1", valid(nil, "wear: 1.5"), "f.yaml:10: wear: is a probability and must be in [0,1], got 1.5"},
		{"site wear < 0", valid(map[int]string{6: "  - {name: c, wear: -0.1}"}), "f.yaml:6: sites[2].wear: is a probability and must be in [0,1], got -0.1"},
		{"chain rows", valid(map[int]string{5: "  - {name: b, chain: [[1,0,0],[0,1,0]]}"}), "f.yaml:5: sites[1].chain: has 2 rows, want a 3x3 matrix"},
		{"chain row length", chainCase("[1, 0, 0]", "[0, 1]", "[0, 0, 1]"), "f.yaml:10: sites[1].chain[1]: has 2 entries, want 3"},
		{"chain negative", chainCase("[1, 0, 0]", "[0, 1.5, -0.5]", "[0, 0, 1]"), "f.yaml:10: sites[1].chain[1]: entry 2 is -0.5; probabilities must be >= 0"},
		{"chain row sum", chainCase("[1, 0, 0]", "[0, 1, 0]", "[0, 0, 0.9]"), "f.yaml:11: sites[1].chain[2]: row sums to 0.9, want 1"},
		{"chain row sum just off", valid(map[int]string{5: "  - {name: b, chain: [[1,0,0],[0,1,0],[0,0,1.000001]]}"}),
			"f.yaml:5: sites[1].chain[2]: row sums to 1.000001, want 1"},
		{"wear and chain", valid(map[int]string{5: "  - {name: b, wear: 0.1, chain: [[1,0,0],[0,1,0],[0,0,1]]}"}), "f.yaml:5: sites[1].chain: give wear or chain, not both"},
		{"threshold level 0", valid(nil, "threshold_level: 0"), "f.yaml:10: threshold_level: must be between 1 and levels = 2, got 0"},
		{"threshold level > L", valid(nil, "threshold_level: 3"), "f.yaml:10: threshold_level: must be between 1 and levels = 2, got 3"},
		{"threshold prob 1", valid(nil, "threshold_prob: 1"), "f.yaml:10: threshold_prob: must be in [0,1), got 1"},
		{"threshold prob < 0", valid(nil, "threshold_prob: -0.2"), "f.yaml:10: threshold_prob: must be in [0,1), got -0.2"},
		{"discount 1", valid(nil, "discount: 1"), "f.yaml:10: discount: must be in (0,1) (the problem never ends), got 1"},
		{"discount 0", valid(nil, "discount: 0"), "f.yaml:10: discount: must be in (0,1) (the problem never ends), got 0"},
		{"horizon 0", valid(nil, "horizon: 0"), "f.yaml:10: horizon: must be between 1 and 1000000 steps, got 0"},
		{"observe", valid(nil, "observe: some"), `f.yaml:10: observe: must be own or all, got "some"`},
		{"no sites", valid(map[int]string{3: "sites: []", 4: "", 5: "", 6: "", 7: "", 8: "", 9: ""}), "f.yaml:3: sites: no sites"},
		{"sites missing", "levels: 1\nlevel_cost: [0, 1]\n", "f.yaml:1: sites: no sites"},
		{"site unnamed", valid(map[int]string{5: "  - {x: 1}"}), "f.yaml:5: sites[1].name: missing"},
		{"duplicate site", valid(map[int]string{6: "  - {name: a}"}), `f.yaml:6: sites[2].name: duplicate site name "a" (also sites[0])`},
		{"site level", valid(map[int]string{6: "  - {name: c, level: 3}"}), "f.yaml:6: sites[2].level: initial level must be between 0 and 2, got 3"},
		{"road to missing site", valid(map[int]string{9: "  - [b, x]"}), `f.yaml:9: roads[1]: no site named "x"`},
		{"road not a pair", valid(map[int]string{9: "  - [a, b, c]"}), "f.yaml:9: roads[1]: want [site, site], got 3 names"},
		{"self loop", valid(map[int]string{9: "  - [c, c]"}), `f.yaml:9: roads[1]: road from "c" to itself`},
		{"duplicate road", valid(nil, "  - [c, b]"), "f.yaml:10: roads[2]: duplicate road c - b (also roads[1])"},
		{"disconnected", valid(map[int]string{9: ""}), `f.yaml:6: sites[2]: site "c" cannot be reached from "a" by roads`},
		{"robots 0", valid(nil, "robots: 0"), "f.yaml:10: robots: must be between 1 and 256, got 0"},
		{"start missing site", valid(nil, "robots: 2", "start: depot"), `f.yaml:11: start: robots on missing sites: "depot"`},
		{"start list missing sites", valid(nil, "start: [a, x, y]"), `f.yaml:10: start: robots on missing sites: "x", "y"`},
		{"start list length", valid(nil, "robots: 3", "start: [a, b]"), "f.yaml:11: start: lists 2 sites for 3 robots"},
		{"start not a name", valid(nil, "start: {a: 1}"), "f.yaml:10: start: want a site name or a list of site names"},
		// A start list without robots sets the count, so it is bounded too.
		{"start list empty", valid(nil, "start: []"), "f.yaml:10: start: lists 0 sites, one per robot, but there must be 1 to 256 robots"},
		{"start list too long", valid(nil, "start: ["+strings.Repeat("a, ", 256)+"a]"), "f.yaml:10: start: lists 257 sites, one per robot, but there must be 1 to 256 robots"},
		{"alias", valid(map[int]string{2: "level_cost: [0, &c 1, *c]"}), "f.yaml:2: level_cost[2]: aliases (*c) are not supported in scenario files"},
		{"merge key", valid(map[int]string{5: "  - {<<: {wear: 0.5}, name: b}"}), "f.yaml:5: sites[1]: merge keys (<<) are not supported in scenario files"},
	}
	for _, c := range cases {
		m, err := Parse("f.yaml", []byte(c.src), 0)
		if err == nil {
			t.Errorf("%s: parsed without error (%d sites)", c.name, m.NumSites())
			continue
		}
		if !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s:\n got  %v\n want %q", c.name, err, c.want)
		}
	}
}

func TestRobotOverride(t *testing.T) {
	one := valid(nil, "robots: 2", "start: b")
	m, err := Parse("f.yaml", []byte(one), 5)
	if err != nil {
		t.Fatal(err)
	}
	if m.Robots() != 5 || !reflect.DeepEqual(m.startPos, []int{1, 1, 1, 1, 1}) {
		t.Errorf("override with one start site: robots %d at %v", m.Robots(), m.startPos)
	}
	list := valid(nil, "robots: 2", "start: [c, a]")
	if m, err = Parse("f.yaml", []byte(list), 0); err != nil || !reflect.DeepEqual(m.startPos, []int{2, 0}) {
		t.Errorf("start list: %v, %v", err, m)
	}
	if m, err = Parse("f.yaml", []byte(list), 2); err != nil || m.Robots() != 2 {
		t.Errorf("override equal to the list: %v", err)
	}
	_, err = Parse("f.yaml", []byte(list), 3)
	want := "f.yaml:11: start: lists 2 sites but 3 robots were asked for"
	if err == nil || !strings.Contains(err.Error(), want) {
		t.Errorf("override against a list: %v, want %q", err, want)
	}
	// A start list alone says how many robots there are.
	if m, err = Parse("f.yaml", []byte(valid(nil, "start: [a, b, c]")), 0); err != nil || m.Robots() != 3 {
		t.Errorf("list without robots: %v", err)
	}
}

func TestLoad(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "park.yaml")
	if err := os.WriteFile(path, []byte(valid(nil, "observe: all")), 0o644); err != nil {
		t.Fatal(err)
	}
	m, err := Load(path, 2)
	if err != nil || m.Robots() != 2 || !m.ObserveAll() {
		t.Fatalf("Load: %v", err)
	}
	if _, err := Load(filepath.Join(dir, "nope.yaml"), 0); err == nil {
		t.Error("Load of a missing file succeeded")
	}
	bad := filepath.Join(dir, "bad.yaml")
	os.WriteFile(bad, []byte(valid(nil, "discount: 2")), 0o644)
	if _, err := Load(bad, 0); err == nil || !strings.HasPrefix(err.Error(), bad+":10: discount:") {
		t.Errorf("Load error should start with the path and line: %v", err)
	}
}

func TestDefaultSolarPark(t *testing.T) {
	m, err := Default(0)
	if err != nil {
		t.Fatal(err)
	}
	if n := m.NumSites(); n < 20 || n > 30 {
		t.Errorf("%d sites, want 20-30", n)
	}
	depot, ok := m.SiteIndex("depot")
	if !ok || m.Robots() != 4 || m.ObserveAll() {
		t.Fatalf("robots %d, depot found %v, observe all %v", m.Robots(), ok, m.ObserveAll())
	}
	for r, p := range m.startPos {
		if p != depot {
			t.Errorf("robot %d starts at %s, want depot", r, m.SiteName(p))
		}
	}
	for a := range m.NumSites() {
		for b := range m.NumSites() {
			if m.Distance(a, b) < 0 {
				t.Fatalf("%s cannot reach %s", m.SiteName(a), m.SiteName(b))
			}
		}
	}
	// "Not too regular": degrees vary.
	degs := map[int]bool{}
	for s := range m.NumSites() {
		degs[len(m.Neighbours(s))] = true
	}
	if len(degs) < 3 {
		t.Errorf("only %d distinct degrees", len(degs))
	}
	if m6, err := Default(6); err != nil || m6.Robots() != 6 {
		t.Errorf("Default(6): %v", err)
	}
}

// Format writes what Parse reads back to the identical model, which is also
// how RandomTiny instances are pushed through the file validator.
func TestFormatRoundTrip(t *testing.T) {
	def, err := Default(0)
	if err != nil {
		t.Fatal(err)
	}
	models := []*Model{def}
	for seed := range uint64(50) {
		models = append(models, RandomTiny(seed))
	}
	for i, m := range models {
		back, err := Parse("formatted.yaml", m.Format(), 0)
		if err != nil {
			t.Fatalf("model %d: %v\n%s", i, err, m.Format())
		}
		if !reflect.DeepEqual(m, back) {
			t.Fatalf("model %d does not round-trip:\n%s", i, m.Format())
		}
	}
}
