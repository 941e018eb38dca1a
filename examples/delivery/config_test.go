package delivery

import (
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
)

const twoStations = "stations:\n  - {name: a, x: 0, y: 0}\n  - {name: b, x: 1, y: 0}\nroads: [[a, b]]\n"

// Every problem in a file is reported as FILE:LINE: FIELD: message, the
// line being the one to fix.
func TestBadFiles(t *testing.T) {
	cases := []struct {
		name, src, want string
	}{
		{"empty", "", "t.yaml: file is empty"},
		{"not a mapping", "- 1\n", "t.yaml:1: top level must be a mapping of field: value"},
		{"unknown field", twoStations + "robtos: 2\n", `t.yaml:5: unknown field "robtos" (misspelt, or a file for another scenario?)`},
		{"fractional robots", twoStations + "robots: 2.5\n", "t.yaml:5: robots: want a whole number, got 2.5"},
		{"no stations", "robots: 2\n", "t.yaml:1: stations: want at least 2 stations {name: ..., x: ..., y: ...}, got 0"},
		{"one station", "stations:\n  - {name: a, x: 0, y: 0}\n", "t.yaml:1: stations: want at least 2 stations {name: ..., x: ..., y: ...}, got 1"},
		{"station without name", "stations:\n  - {name: a, x: 0, y: 0}\n  - {x: 1, y: 0}\n", "t.yaml:3: stations[1].name: missing: every station needs a name"},
		{"duplicate station", "stations:\n  - {name: a, x: 0, y: 0}\n  - {name: a, x: 1, y: 0}\n", `t.yaml:3: stations[1].name: duplicate station name "a" (also stations[0])`},
		{"infinite x", "stations:\n  - {name: a, x: .inf, y: 0}\n  - {name: b, x: 1, y: 0}\n", "t.yaml:2: stations[0]: x and y must be finite numbers"},
		{"send over 1", "stations:\n  - {name: a, x: 0, y: 0}\n  - {name: b, x: 1, y: 0, send: 1.5}\n", "t.yaml:3: stations[1].send: is a probability per step and must be in [0,1], got 1.5"},
		{"negative receive", "stations:\n  - {name: a, x: 0, y: 0, receive: -1}\n  - {name: b, x: 1, y: 0}\n", "t.yaml:2: stations[0].receive: is a weight and must be a finite number >= 0, got -1"},
		{"default send NaN", twoStations + "send: .nan\n", "t.yaml:5: send: is a probability per step and must be in [0,1], got NaN"},
		{"road to nowhere", "stations:\n  - {name: a, x: 0, y: 0}\n  - {name: b, x: 1, y: 0}\nroads:\n  - [a, b]\n  - [b, c]\n", `t.yaml:6: roads[1]: no station named "c"`},
		{"road of three", "stations:\n  - {name: a, x: 0, y: 0}\n  - {name: b, x: 1, y: 0}\nroads:\n  - [a, b, a]\n", "t.yaml:5: roads[0]: want [station, station], got 3 names"},
		{"road to itself", "stations:\n  - {name: a, x: 0, y: 0}\n  - {name: b, x: 1, y: 0}\nroads:\n  - [a, a]\n", `t.yaml:5: roads[0]: road from "a" to itself`},
		{"duplicate road", "stations:\n  - {name: a, x: 0, y: 0}\n  - {name: b, x: 1, y: 0}\nroads:\n  - [a, b]\n  - [b, a]\n", "t.yaml:6: roads[1]: duplicate road b - a (also roads[0])"},
		{"disconnected", "stations:\n  - {name: a, x: 0, y: 0}\n  - {name: b, x: 1, y: 0}\n  - {name: c, x: 2, y: 0}\nroads:\n  - [a, b]\n", `t.yaml:4: stations[2]: station "c" cannot be reached from "a" by roads (the graph must be connected)`},
		{"nobody receives", "stations:\n  - {name: a, x: 0, y: 0, send: 0.1}\n  - {name: b, x: 1, y: 0, receive: 0}\nroads: [[a, b]]\n", `t.yaml:2: stations[0]: station "a" sends parcels but no other station receives any (every other receive is 0)`},
		{"zero robots", twoStations + "robots: 0\n", "t.yaml:5: robots: must be between 1 and 256, got 0"},
		{"too many robots", twoStations + "robots: 300\n", "t.yaml:5: robots: must be between 1 and 256, got 300"},
		{"start elsewhere", twoStations + "start: [c]\n", `t.yaml:5: start[0]: no station named "c"`},
		{"empty start", twoStations + "start: []\n", "t.yaml:5: start: want a list of stations: one for every robot, or one per robot"},
		{"start count", twoStations + "robots: 3\nstart: [a, b]\n", "t.yaml:6: start: lists 2 stations for 3 robots"},
		{"start as text", twoStations + "start: a\n", "t.yaml:5: cannot read the text `a` into []string"},
		{"horizon 0", twoStations + "horizon: 0\n", "t.yaml:5: horizon: must be between 1 and 100000 steps, got 0"},
		{"discount 0", twoStations + "discount: 0\n", "t.yaml:5: discount: must be in (0,1], got 0"},
		{"capacity 0", twoStations + "capacity: 0\n", "t.yaml:5: capacity: must be between 1 and 1024 parcel slots, got 0"},
		{"negative cost", twoStations + "wait_cost: -1\n", "t.yaml:5: wait_cost: must be a finite cost >= 0, got -1"},
		{"infinite cost", twoStations + "ride_cost: .inf\n", "t.yaml:5: ride_cost: must be a finite cost >= 0, got +Inf"},
		{"parcel from nowhere", twoStations + "parcels:\n  - {at: z, to: a}\n", `t.yaml:6: parcels[0].at: no station named "z"`},
		{"parcel to nowhere", twoStations + "parcels:\n  - {at: a, to: z}\n", `t.yaml:6: parcels[0].to: no station named "z"`},
		{"parcel already there", twoStations + "parcels:\n  - {at: a, to: b}\n  - {at: b, to: b}\n", `t.yaml:7: parcels[1].to: a parcel at "b" for "b" is already there`},
		{"parcels over capacity", twoStations + "capacity: 1\nparcels:\n  - {at: a, to: b}\n  - {at: b, to: a}\n", "t.yaml:6: parcels: lists 2 parcels but capacity is 1 slots"},
		{"alias", "stations:\n  - &s {name: a, x: 0, y: 0}\n  - *s\n", "t.yaml:3: stations[1]: aliases (*s) are not supported in scenario files: write the value out"},
		{"key twice", twoStations + "robots: 2\nrobots: 3\n", "t.yaml:6: robots: given twice (first on line 5)"},
	}
	for _, c := range cases {
		_, err := Parse("t.yaml", []byte(c.src), 0)
		if err == nil || err.Error() != c.want {
			t.Errorf("%s: err = %v\nwant %s", c.name, err, c.want)
		}
	}
}

func TestRobotOverride(t *testing.T) {
	// One start station: any fleet size starts there.
	m, err := Parse("t.yaml", []byte(twoStations+"robots: 2\nstart: [b]\n"), 5)
	if err != nil || m.Robots() != 5 || !slices.Equal(start(m).Pos, []int32{1, 1, 1, 1, 1}) {
		t.Fatalf("override 5: %v %v", m, err)
	}
	// A start list holds the fleet to its length.
	src := twoStations + "start: [a, b, a]\n"
	if m, err := Parse("t.yaml", []byte(src), 0); err != nil || m.Robots() != 3 {
		t.Fatalf("a start list of 3: %v", err)
	}
	if m, err := Parse("t.yaml", []byte(src), 3); err != nil || !slices.Equal(start(m).Pos, []int32{0, 1, 0}) {
		t.Fatalf("override 3 with 3 starts: %v", err)
	}
	_, err = Parse("t.yaml", []byte(src), 4)
	if want := "t.yaml:5: start: lists 3 stations but 4 robots were asked for; give one station or a list of 4"; err == nil || err.Error() != want {
		t.Errorf("override 4 with 3 starts: %v\nwant %s", err, want)
	}
	_, err = Parse("t.yaml", []byte(twoStations), 300)
	if want := "t.yaml:1: robots: at most 256 robots, 300 were asked for"; err == nil || err.Error() != want {
		t.Errorf("override 300: %v\nwant %s", err, want)
	}
}

// The example file is the built-in instance, and Load names the file in
// its errors.
func TestLoad(t *testing.T) {
	m, err := Load("depot.yaml", 0)
	if err != nil {
		t.Fatal(err)
	}
	d := mustDefault(t, 0)
	a, _ := m.Flatten(start(m), nil, nil)
	b, _ := d.Flatten(start(d), nil, nil)
	if !slices.Equal(a, b) || !slices.Equal(m.send, d.send) || !slices.Equal(m.destCum, d.destCum) || m.Robots() != d.Robots() {
		t.Error("depot.yaml and the built-in instance differ")
	}
	if _, err := Load("no-such-file.yaml", 0); err == nil || !strings.Contains(err.Error(), "no-such-file.yaml") {
		t.Errorf("missing file: %v", err)
	}
	bad := filepath.Join(t.TempDir(), "bad.yaml")
	if err := os.WriteFile(bad, []byte(twoStations+"capacity: -2\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	if _, err := Load(bad, 0); err == nil || err.Error() != bad+":5: capacity: must be between 1 and 1024 parcel slots, got -2" {
		t.Errorf("bad file: %v", err)
	}
}

// The destination table is each station's distribution over the others.
func TestDestinations(t *testing.T) {
	m := parse(t, "stations:\n  - {name: a, x: 0, y: 0, receive: 1}\n  - {name: b, x: 1, y: 0, receive: 3}\n  - {name: c, x: 2, y: 0, receive: 0}\nroads: [[a, b], [b, c]]\n")
	for _, c := range []struct {
		from int
		u    float64
		want int32
	}{{0, 0, 1}, {0, 0.999, 1}, {1, 0, 0}, {1, 0.999, 0}, {2, 0.2, 0}, {2, 0.3, 1}, {2, 0.9999999, 1}} {
		if got := m.destination(c.from, c.u); got != c.want {
			t.Errorf("from %d at %g: %d, want %d", c.from, c.u, got, c.want)
		}
	}
}

func TestWithStarts(t *testing.T) {
	m := mustDefault(t, 3)
	w, err := m.WithStarts([]string{"hub", "farm", "park"})
	if err != nil || !slices.Equal(start(w).Pos, []int32{0, 10, 9}) || !slices.Equal(start(m).Pos, []int32{0, 0, 0}) {
		t.Fatalf("%v: %v", err, start(w).Pos)
	}
	if _, err := m.WithStarts([]string{"hub"}); err == nil || err.Error() != "1 start stations for 3 robots" {
		t.Errorf("count: %v", err)
	}
	if _, err := m.WithStarts([]string{"hub", "pier", "park"}); err == nil || err.Error() != `robot 1: no station named "pier"` {
		t.Errorf("name: %v", err)
	}
}
