package config

import (
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
	}
	for _, c := range cases {
		var v cfg
		_, err := Parse("f.yaml", []byte(c.src), &v)
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: err = %v, want it to contain %q", c.name, err, c.want)
		}
	}
}
