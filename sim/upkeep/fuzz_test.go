package upkeep

import (
	"encoding/binary"
	"fmt"
	"math"
	"os"
	"reflect"
	"slices"
	"strings"
	"testing"

	"baton/sim/fuzzcheck"
	"baton/sim/model"
)

// parseSeeds are edge cases of the upkeep format, most departing from the
// smallest valid file; FuzzParse adds the real files.
var parseSeeds = []string{
	"",
	valid(nil),
	valid(nil, "observe: all", "robots: 2", "start: [a, c]", "threshold_level: 2", "threshold_prob: 0", "horizon: 1000000"),
	valid(map[int]string{5: "  - {name: b, chain: [[0.5, 0.5, 0], [0, 0.5, 0.5], [0, 0, 1]], level: 2}"}),
	// A row that sums to 1 within the tolerance, so it is rescaled.
	valid(map[int]string{5: "  - {name: b, chain: [[0.3333333333, 0.3333333333, 0.3333333334], [0, 1, 0], [0, 0, 1.0000000001]]}"}),
	// Sizes at and past their limits, negative, fractional and huge.
	valid(map[int]string{1: "levels: 8", 2: "level_cost: [0, 1, 2, 3, 4, 5, 6, 7, 8]"}),
	valid(map[int]string{1: "levels: 9"}),
	valid(map[int]string{1: "levels: -1"}),
	valid(map[int]string{1: "levels: 2.5"}),
	valid(map[int]string{1: "levels: 9223372036854775807"}),
	valid(nil, "robots: 256"),
	valid(nil, "robots: 257"),
	valid(nil, "start: []"),
	valid(nil, "start: ["+strings.Repeat("b, ", 256)+"b]"),
	valid(nil, "horizon: 1000001"),
	// Numbers that are not finite.
	valid(map[int]string{2: "level_cost: [.nan, .inf, -.inf]"}),
	valid(map[int]string{4: "  - {name: a, x: .nan, y: 1e400}"}),
	valid(nil, "wear: .nan"),
	valid(nil, "threshold_prob: .nan", "discount: .nan"),
	valid(map[int]string{5: "  - {name: b, chain: [[.nan, 1, 0], [0, 1, 0], [0, 0, 1]]}"}),
	valid(map[int]string{5: "  - {name: b, chain: [[1e308, 1e308, -1e308], [0, 1, 0], [0, 0, 1]]}"}),
	// Shapes: chains, roads, start, sites that are not what they should be.
	valid(map[int]string{5: "  - {name: b, chain: [[1, 0], [0, 1]]}"}),
	valid(map[int]string{5: "  - {name: b, chain: [[1, 0, 0, 0], [0, 1, 0], [0, 0, 1]]}"}),
	valid(map[int]string{5: "  - {name: b, chain: 1}"}),
	valid(map[int]string{9: "  - [b, c, a]"}),
	valid(map[int]string{9: "  - [b]"}),
	valid(map[int]string{9: "  - b"}),
	valid(nil, "  - [c, b]"),
	valid(map[int]string{9: ""}),
	valid(nil, "start: [[a]]"),
	valid(nil, "start: {a: b}"),
	valid(nil, "start: ~"),
	valid(map[int]string{4: "  - {name: ''}"}),
	valid(map[int]string{4: `  - {name: "\x00\u00e9 \" x"}`, 8: `  - ["\x00\u00e9 \" x", b]`}),
	valid(nil, "observe: ''"),
	// Aliases, merges and repeats.
	valid(map[int]string{2: "level_cost: &c [0, 1, 5]"}, "start: *c"),
	valid(map[int]string{5: "  - {<<: {wear: 0.5}, name: b}"}),
	valid(nil, "levels: 2"),
	"levels: 1\nlevel_cost: [0, 1]\nsites: [{name: a}]\n",
	"levels: 1\nlevel_cost: [0, 1]\nsites: [{name: a}]\nroads: [[a, a]]\n",
	"width: 4\n",
}

// No file panics, every problem names the file, a parse stays within the
// documented allocation bound, and whatever parses is a model that Format
// writes back to itself and that can start and step.
func FuzzParse(f *testing.F) {
	example, err := os.ReadFile("../../deploy/examples/upkeep-tiny.yaml")
	if err != nil {
		f.Fatal(err)
	}
	for _, robots := range []int{0, 1, 3, 256, 257, -1, 1 << 40} {
		f.Add(example, robots)
	}
	f.Add(solarPark, 0)
	f.Add(solarPark, 6)
	for seed := range uint64(4) {
		f.Add(RandomTiny(seed).Format(), 0)
	}
	for _, s := range parseSeeds {
		f.Add([]byte(s), 0)
	}
	f.Fuzz(checkParse)
}

// largeInputs are files at the size limits: seeds this large would stall
// the fuzzer, which minimises every input it finds interesting.
func largeInputs() []string {
	park := func(sites int, road func(b *strings.Builder, i int)) string {
		var b strings.Builder
		b.WriteString("levels: 8\nlevel_cost: [0, 1, 2, 3, 4, 5, 6, 7, 8]\nrobots: 256\nsites:\n")
		for i := range sites {
			fmt.Fprintf(&b, "  - {name: s%d, level: 8}\n", i)
		}
		b.WriteString("roads:\n")
		for i := 1; i < sites; i++ {
			road(&b, i)
		}
		return b.String()
	}
	path := func(b *strings.Builder, i int) { fmt.Fprintf(b, "  - [s%d, s%d]\n", i-1, i) }
	star := func(b *strings.Builder, i int) { fmt.Fprintf(b, "  - [s0, s%d]\n", i) }
	return []string{park(maxSites, path), park(maxSites, star), park(maxSites+1, path)}
}

func TestParseLargeInputs(t *testing.T) {
	for _, s := range largeInputs() {
		checkParse(t, []byte(s), 0)
	}
}

func checkParse(t *testing.T, data []byte, robots int) {
	var m *Model
	var err error
	n := fuzzcheck.Allocated(func() { m, err = Parse("u.yaml", data, robots) })
	if limit := uint64(AllocPerByte*len(data) + AllocFixed); n > limit {
		t.Fatalf("parsing %d bytes allocated %d, over the documented %d", len(data), n, limit)
	}
	if err != nil {
		if !strings.HasPrefix(err.Error(), "u.yaml:") {
			t.Fatalf("error does not name the file: %v", err)
		}
		return
	}
	if m.Robots() < 1 || m.Robots() > maxRobots || (robots > 0 && m.Robots() != robots) {
		t.Fatalf("%d robots (%d asked for)", m.Robots(), robots)
	}
	if m.NumSites() < 1 || m.NumSites() > maxSites {
		t.Fatalf("%d sites", m.NumSites())
	}
	back, err := Parse("formatted.yaml", m.Format(), 0)
	if err != nil {
		t.Fatalf("Format wrote a file Parse refuses: %v\n%s", err, m.Format())
	}
	if !reflect.DeepEqual(m, back) {
		t.Fatalf("Format does not round-trip:\n%s", m.Format())
	}
	s := m.NewState()
	m.Start(s, model.NewRNG(1).Rand)
	u := make([]int, m.Robots())
	model.BaseJoint(m, s, u)
	m.Step(s, u, model.NewRNG(2).Rand)
}

// FuzzUnflatten feeds decision-state snapshots (what a robot receives over
// the bus) built from arbitrary bytes to the demo park: a snapshot is
// refused with dst untouched, or admitted, in which case its beliefs may
// rejoin the tables and the state flattens back to the same values and
// steps without a panic. Seeds: a real snapshot after a few steps, and
// damaged ones.
func FuzzUnflatten(f *testing.F) {
	m, err := Default(4)
	if err != nil {
		f.Fatal(err)
	}
	s := m.NewState()
	m.Start(s, nil)
	rng := model.NewRNG(3)
	u := make([]int, 4)
	for range 7 {
		model.BaseJoint(m, s, u)
		m.Step(s, u, rng.Rand)
	}
	ints, reals := m.Flatten(s, nil, nil)
	enc := func(ints []int32, reals []float64) []byte {
		var b []byte
		for _, v := range ints {
			b = binary.LittleEndian.AppendUint32(b, uint32(v))
		}
		for _, v := range reals {
			b = binary.LittleEndian.AppendUint64(b, math.Float64bits(v))
		}
		return b
	}
	f.Add(enc(ints, reals))
	bad := append([]float64(nil), reals...)
	bad[5] = math.NaN()
	f.Add(enc(ints, bad))
	f.Add(enc([]int32{0, 1, 2, 99}, reals))
	f.Add(enc(ints, reals[:10]))
	f.Fuzz(func(t *testing.T, data []byte) {
		var in []int32
		for len(in) < 4 && len(data) >= 4 {
			in = append(in, int32(binary.LittleEndian.Uint32(data)))
			data = data[4:]
		}
		var re []float64
		for len(data) >= 8 && len(re) < 400 {
			re = append(re, math.Float64frombits(binary.LittleEndian.Uint64(data)))
			data = data[8:]
		}
		dst := m.NewState()
		m.CopyState(dst, s)
		i0, r0 := m.Flatten(dst, nil, nil)
		if err := m.Unflatten(dst, in, re); err != nil {
			i1, r1 := m.Flatten(dst, nil, nil)
			if !slices.Equal(i0, i1) || !sameBits(r0, r1) {
				t.Fatalf("a refused snapshot (%v) changed the state", err)
			}
			return
		}
		i1, r1 := m.Flatten(dst, nil, nil)
		if !slices.Equal(i1, in) || !slices.Equal(r1, re) {
			t.Fatalf("admitted %v %v, flattens to %v %v", in, re, i1, r1)
		}
		model.BaseJoint(m, dst, u)
		m.Step(dst, u, model.NewRNG(1).Rand)
	})
}
