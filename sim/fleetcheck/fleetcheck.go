// Package fleetcheck checks a scenario against the model.Fleet round trip
// that makes a distributed fleet decide exactly as in-process rollout
// does: from a copy z of x, Advance(z, u) followed by every robot's report
// (Position and Sense of y = Step(x, u)) through Absorb must rebuild y bit
// for bit, with the same stage cost. Every scenario's tests run it (harbor,
// upkeep, and an integrator's own, such as examples/delivery).
package fleetcheck

import (
	"fmt"
	"math"
	"slices"

	"baton/sim/model"
)

// Options of a RoundTrip run. Zero values are sensible.
type Options struct {
	// Seed seeds starts, controls and disturbances.
	Seed uint64
	// Episodes is the number of starts (0: 8). Each runs to the horizon,
	// or up to 3 steps past a terminal state (those must round-trip too).
	Episodes int
	// Invalid also draws the control one past the last (scenarios that
	// treat an invalid control as staying put).
	Invalid bool
	// Same compares what Flatten does not carry (nil: nothing more).
	Same func(y, z model.State) error
	// Visit sees every state Step produced, for a test's own counts.
	Visit func(y model.State)
}

// Stats is what a run covered.
type Stats struct {
	Steps    int // steps checked
	Terminal int // of them, taken from a terminal state
}

// RoundTrip steps m with random controls (half replaced by the base
// policy's, so episodes also reach where the base policy goes) and checks
// the round trip at every step. The next step starts from the rebuilt
// state, not from Step's, so a mismatch would compound. The error names
// the first mismatch.
func RoundTrip(m model.Fleet, o Options) (Stats, error) {
	if o.Episodes <= 0 {
		o.Episodes = 8
	}
	rng := model.NewRNG(o.Seed)
	x, y, z := m.NewState(), m.NewState(), m.NewState()
	u := make([]int, m.Robots())
	var seen []model.Sighting
	var iy, iz []int32
	var ry, rz []float64
	var st Stats
	for range o.Episodes {
		m.Start(x, rng.Rand)
		for t, over := 0, 0; t < m.Horizon() && over < 3; t++ {
			if m.Terminal(x) {
				over++
				st.Terminal++
			}
			for r := range u {
				n := m.NumControls(x, r)
				if o.Invalid {
					n++
				}
				u[r] = rng.IntN(n)
				if rng.IntN(2) == 0 {
					u[r] = m.Base(x, r)
				}
			}
			m.CopyState(y, x)
			m.CopyState(z, x)
			cy := m.Step(y, u, rng.Rand)
			cz := m.Advance(z, u)
			if math.Float64bits(cy) != math.Float64bits(cz) {
				return st, fmt.Errorf("step %d: Step cost %v, Advance cost %v", st.Steps, cy, cz)
			}
			for r := range m.Robots() {
				seen = m.Sense(y, r, seen[:0])
				if err := m.Absorb(z, r, m.Position(y, r), seen); err != nil {
					return st, fmt.Errorf("step %d: Absorb: %w", st.Steps, err)
				}
			}
			iy, ry = m.Flatten(y, iy[:0], ry[:0])
			iz, rz = m.Flatten(z, iz[:0], rz[:0])
			if !slices.Equal(iy, iz) || !sameBits(ry, rz) {
				return st, fmt.Errorf("step %d: after Step %v %v, rebuilt %v %v", st.Steps, iy, ry, iz, rz)
			}
			if o.Same != nil {
				if err := o.Same(y, z); err != nil {
					return st, fmt.Errorf("step %d: %w", st.Steps, err)
				}
			}
			if o.Visit != nil {
				o.Visit(y)
			}
			m.CopyState(x, z)
			st.Steps++
		}
	}
	return st, nil
}

func sameBits(a, b []float64) bool {
	return slices.EqualFunc(a, b, func(p, q float64) bool { return math.Float64bits(p) == math.Float64bits(q) })
}
