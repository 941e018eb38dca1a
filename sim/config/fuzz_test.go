package config

import (
	"baton/sim/fuzzcheck"
	"fmt"
	"strings"
	"testing"

	"go.yaml.in/yaml/v3"
)

// scenario has the shapes real scenario files decode into: scalars of each
// kind, a fixed-size cell, lists of cells, rows and structs, a pointer and a
// raw node (upkeep's start).
type scenario struct {
	Name  string      `yaml:"name"`
	Width int         `yaml:"width"`
	Rate  float64     `yaml:"rate"`
	On    bool        `yaml:"on"`
	Cell  [2]int      `yaml:"cell"`
	Cells [][2]int    `yaml:"cells"`
	Costs []float64   `yaml:"costs"`
	Rows  [][]float64 `yaml:"rows"`
	Items []inner     `yaml:"items"`
	Sub   *inner      `yaml:"sub"`
	Start yaml.Node   `yaml:"start"`
}

// parseSeeds are edge cases of YAML itself; the scenario packages seed
// their own fuzzers with real files.
var parseSeeds = []string{
	"",
	"\n",
	"---\n",
	"~\n",
	"- 1\n",
	"name: a\nwidth: 3\nrate: 0.5\non: true\ncell: [1, 2]\ncells: [[0, 0], [1, 1]]\ncosts: [0, 1, 4]\n" +
		"rows:\n  - [1, 0]\n  - [0, 1]\nitems:\n  - x: 1\n  - {x: 2}\nsub: {x: 3}\nstart: [a, b]\n",
	"name: a\n---\nname: b\n",
	// Numbers out of range, not numbers, not finite.
	"width: 99999999999999999999999\n",
	"width: -9223372036854775809\n",
	"width: 0x7fffffffffffffff\n",
	"width: -1\nrate: -0\n",
	"rate: 1e400\n",
	"rate: .nan\ncosts: [.inf, -.inf, .NaN]\n",
	"width: .inf\n",
	"width: 2.5\n",
	"items: [{x: 1.5}]\n",
	"width: !!float 3\n",
	// Wrong types and shapes.
	"width: [1]\n",
	"items: 3\n",
	"cell: [1, 2, 3]\n",
	"cells: [[1]]\n",
	"on: maybe\n",
	"sub: [1]\nstart: {a: 1}\n",
	"name: !!binary aGk=\n",
	"name: !custom x\n",
	"? [a]\n: 1\n",
	"width: 1\nwidth: 2\n",
	"items:\n  - {x: 1, x: 2}\n",
	"colour: red\n",
	"items:\n  - {x: 1, hue: 2}\n",
	// Aliases: plain, self-referring, a merge, and a billion laughs.
	"name: &a x\nstart: *a\n",
	"rows: &r [*r]\n",
	"sub: {<<: {x: 1}}\n",
	"name: &a x\n? [*a]\n: 1\n",
	"rows: [&a [1,1,1,1,1,1,1,1,1,1], &b [*a,*a,*a,*a,*a,*a,*a,*a,*a,*a], &c [*b,*b,*b,*b,*b,*b,*b,*b,*b,*b]]\n",
	// Syntax.
	"name: [a\n",
	"name: 'a\n",
	"\tname: a\n",
	"%YAML 1.1\n%YAML 1.1\n---\nname: a\n",
	// Deep nesting, both styles.
	"rows: " + strings.Repeat("[", 100) + strings.Repeat("]", 100) + "\n",
	"rows:\n" + strings.Repeat("- ", 100) + "1\n",
	"sub: " + strings.Repeat("{", 100) + "\n",
	// A repeated key: the library reported every repeated pair.
	"costs:\n" + strings.Repeat("? \n", 50),
	// Many errors at once.
	"costs: [" + strings.Repeat("a, ", 50) + "a]\n",
}

// largeInputs are the worst cases found at scale. They are a test of their
// own rather than seeds: the fuzzer minimises every new input it finds
// interesting, and minimising one derived from a large seed stalls it.
var largeInputs = []string{
	// Nesting up to the library's depth limit, both styles, and past it.
	"rows: " + strings.Repeat("[", 9990) + strings.Repeat("]", 9990) + "\n",
	"rows:\n" + strings.Repeat("- ", 9990) + "1\n",
	"sub: " + strings.Repeat("{", 10001) + "\n",
	// A repeated key: the library reported every repeated pair, 36 GB for
	// 30 kB of these.
	"costs:\n" + strings.Repeat("? \n", 10000),
	// One large mapping of distinct keys, which the library compares pair
	// by pair (tens of seconds for 1 MB).
	"sub:\n  x: 1\n" + genKeys(20000),
	// An error per element.
	"costs: [" + strings.Repeat("a, ", 20000) + "a]\n",
	// Exactly at the size limit, and one byte over.
	"name: a\n" + strings.Repeat("#", MaxFileBytes-8),
	strings.Repeat("#", MaxFileBytes+1),
}

func genKeys(n int) string {
	var b strings.Builder
	for i := range n {
		fmt.Fprintf(&b, "  k%d: 1\n", i)
	}
	return b.String()
}

// No input panics, every problem names the file, and a parse stays within
// the documented allocation bound.
func FuzzParse(f *testing.F) {
	for _, s := range parseSeeds {
		f.Add([]byte(s))
	}
	f.Fuzz(checkParse)
}

func TestParseLargeInputs(t *testing.T) {
	for _, s := range largeInputs {
		checkParse(t, []byte(s))
	}
}

func checkParse(t *testing.T, data []byte) {
	var dst scenario
	var doc *Doc
	var err error
	n := fuzzcheck.Allocated(func() { doc, err = Parse("f.yaml", data, &dst) })
	if limit := uint64(AllocPerByte*len(data) + AllocFixed); n > limit {
		t.Fatalf("parsing %d bytes allocated %d, over the documented %d", len(data), n, limit)
	}
	if err != nil {
		if !strings.HasPrefix(err.Error(), "f.yaml:") {
			t.Fatalf("error does not name the file: %v", err)
		}
		return
	}
	for _, p := range []string{"name", "cells[1]", "items[0].x", "rows[0][1]", "start"} {
		if doc.Has(p) && doc.Line(p) < 1 {
			t.Fatalf("%s is set but has no line", p)
		}
	}
}
