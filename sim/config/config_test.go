package config

import (
	"baton/sim/fuzzcheck"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

type inner struct {
	X int `yaml:"x"`
}

type cfg struct {
	Name  string  `yaml:"name"`
	Items []inner `yaml:"items"`
}

func TestParseReportsLines(t *testing.T) {
	src := "name: a\nitems:\n  - x: 1\n  - x: 2\n"
	var c cfg
	d, err := Parse("f.yaml", []byte(src), &c)
	if err != nil {
		t.Fatal(err)
	}
	if got := d.Line("items[1].x"); got != 4 {
		t.Errorf("line of items[1].x = %d, want 4", got)
	}
	if got := d.Line("items[7].x"); got != 2 {
		t.Errorf("missing index falls back to enclosing field: got %d, want 2", got)
	}
	if !d.Has("items[0].x") || d.Has("nope") {
		t.Error("Has is wrong")
	}
	e := d.Errorf("items[1].x", "must be < %d", 2).Error()
	if e != "f.yaml:4: items[1].x: must be < 2" {
		t.Errorf("Errorf = %q", e)
	}
}

func TestParseErrors(t *testing.T) {
	cases := []struct{ name, src, want string }{
		{"unknown key", "name: a\ncolour: red\n", "f.yaml:2: unknown field \"colour\" (misspelt, or a file for another scenario?)"},
		{"wrong type", "name: a\nitems: 3\n", "f.yaml:2:"},
		{"syntax", "name: [a\n", "f.yaml:"},
		{"empty", "", "f.yaml: file is empty"},
		{"fraction for an int", "name: a\nitems:\n  - x: 2.5\n", "f.yaml:3: items[0].x: want a whole number, got 2.5"},
		{"not a mapping", "- 1\n- 2\n", "top level must be a mapping"},
		{"alias", "name: &n a\nitems:\n  - x: 1\n  - x: *n\n", "f.yaml:4: items[1].x: aliases (*n) are not supported in scenario files"},
		{"merge key", "items:\n  - {<<: {x: 1}}\n", "f.yaml:2: items[0]: merge keys (<<) are not supported in scenario files"},
		{"key twice", "name: a\nitems: []\nname: b\n", "f.yaml:3: name: given twice (first on line 1)"},
		{"empty key twice", "? \n? \n", "f.yaml:2: a key given twice (first on line 1)"},
		{"unknown nested key", "items:\n  - {x: 1, y: 2}\n", "f.yaml:2: unknown field \"y\""},
		{"key not text", "? [x]\n: 1\n", "f.yaml:1: a field name must be plain text"},
		{"too big", "name: a\n" + strings.Repeat("#", MaxFileBytes), "f.yaml: 1048584 bytes, more than the 1048576-byte limit"},
	}
	for _, c := range cases {
		var v cfg
		_, err := Parse("f.yaml", []byte(c.src), &v)
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: err = %v, want it to contain %q", c.name, err, c.want)
		}
	}
}

// Only the first problems of a long list are worth reading.
func TestParseErrorsCapped(t *testing.T) {
	var v cfg
	_, err := Parse("f.yaml", []byte("name: a\nitems:\n"+strings.Repeat("  - x: a\n", 50)), &v)
	if err == nil {
		t.Fatal("no error")
	}
	lines := strings.Split(err.Error(), "\n")
	if len(lines) != maxReported+1 || lines[maxReported] != "f.yaml: and 40 more problems" {
		t.Errorf("got %d lines, ending %q", len(lines), lines[len(lines)-1])
	}
}

// The size is checked before the file is read, so a huge file costs nothing.
func TestReadFileSizeLimit(t *testing.T) {
	dir := t.TempDir()
	ok, big := filepath.Join(dir, "ok.yaml"), filepath.Join(dir, "big.yaml")
	if err := os.WriteFile(ok, []byte("name: a\n"+strings.Repeat("#", MaxFileBytes-8)), 0o644); err != nil {
		t.Fatal(err)
	}
	var v cfg
	if _, err := ReadFile(ok, &v); err != nil || v.Name != "a" {
		t.Fatalf("a file at the limit: %v", err)
	}
	fh, err := os.Create(big)
	if err != nil {
		t.Fatal(err)
	}
	// Sparse: 1 GB on paper, nothing on disk.
	if err := fh.Truncate(1 << 30); err != nil {
		t.Fatal(err)
	}
	fh.Close()
	n := fuzzcheck.Allocated(func() { _, err = ReadFile(big, &v) })
	want := big + ": 1073741824 bytes, more than the 1048576-byte limit for scenario files (config.MaxFileBytes)"
	if err == nil || err.Error() != want {
		t.Errorf("err = %v\nwant %s", err, want)
	}
	if n > 1<<20 {
		t.Errorf("refusing the file allocated %d bytes", n)
	}
	if _, err := ReadBytes(filepath.Join(dir, "missing.yaml")); err == nil || !strings.HasPrefix(err.Error(), "scenario file: ") {
		t.Errorf("missing file: %v", err)
	}
}
