package delivery

import (
	"fmt"
	"strings"
	"testing"

	"baton/sim/model"
)

// parse builds an instance from YAML text, failing the test on an error.
func parse(t testing.TB, src string) *Model {
	t.Helper()
	m, err := Parse("t.yaml", []byte(src), 0)
	if err != nil {
		t.Fatal(err)
	}
	return m
}

// line is a b - c - d ... road of n stations named s0..s(n-1), x = index.
func line(n int, extra string) string {
	var b strings.Builder
	b.WriteString("stations:\n")
	for i := range n {
		fmt.Fprintf(&b, "  - {name: s%d, x: %d, y: 0}\n", i, i)
	}
	b.WriteString("roads:\n")
	for i := 1; i < n; i++ {
		fmt.Fprintf(&b, "  - [s%d, s%d]\n", i-1, i)
	}
	return b.String() + extra
}

// randomTiny is a random small instance: 2-6 stations on a random
// connected graph, 1-3 robots on random stations, 1-5 parcel slots (so
// full slots turn parcels away), random send and receive rates (a third
// of them send nothing, and end), and a few start parcels.
func randomTiny(seed uint64) *Model {
	rng := model.NewRNG(seed)
	n := 2 + rng.IntN(5)
	robots := 1 + rng.IntN(3)
	capacity := 1 + rng.IntN(5)
	sends := rng.IntN(3) != 0
	var b strings.Builder
	fmt.Fprintf(&b, "robots: %d\ncapacity: %d\nhorizon: 40\n", robots, capacity)
	b.WriteString("start: [")
	for r := range robots {
		if r > 0 {
			b.WriteString(", ")
		}
		fmt.Fprintf(&b, "s%d", rng.IntN(n))
	}
	b.WriteString("]\nstations:\n")
	for i := range n {
		send := 0.0
		if sends {
			send = 0.5 * rng.Float64()
		}
		fmt.Fprintf(&b, "  - {name: s%d, x: %d, y: %d, send: %g, receive: %g}\n", i, rng.IntN(5), rng.IntN(5), send, 0.1+rng.Float64())
	}
	b.WriteString("roads:\n")
	have := map[[2]int]bool{}
	for i := 1; i < n; i++ { // a random spanning tree, then a few more roads
		j := rng.IntN(i)
		have[[2]int{j, i}] = true
		fmt.Fprintf(&b, "  - [s%d, s%d]\n", j, i)
	}
	for range rng.IntN(3) {
		i, j := rng.IntN(n), rng.IntN(n)
		if i == j || have[[2]int{min(i, j), max(i, j)}] {
			continue
		}
		have[[2]int{min(i, j), max(i, j)}] = true
		fmt.Fprintf(&b, "  - [s%d, s%d]\n", i, j)
	}
	b.WriteString("parcels:\n")
	for range min(capacity, 1+rng.IntN(3)) {
		a := rng.IntN(n)
		c := (a + 1 + rng.IntN(n-1)) % n
		fmt.Fprintf(&b, "  - {at: s%d, to: s%d}\n", a, c)
	}
	m, err := Parse(fmt.Sprintf("tiny-%d.yaml", seed), []byte(b.String()), 0)
	if err != nil {
		panic(fmt.Sprintf("randomTiny(%d): %v\n%s", seed, err, b.String()))
	}
	return m
}

func start(m *Model) *State {
	s := m.NewState().(*State)
	m.Start(s, nil)
	return s
}

func mustDefault(t testing.TB, robots int) *Model {
	t.Helper()
	m, err := Default(robots)
	if err != nil {
		t.Fatal(err)
	}
	return m
}
