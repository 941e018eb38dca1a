package upkeep

import (
	"testing"

	"baton/sim/model"
)

// BenchmarkStep is the Q-factor inner loop on the demo park: base controls
// for 4 robots, then one Step. Episodes restart at the horizon so the
// beliefs stay in their usual range.
func BenchmarkStep(b *testing.B) {
	m, err := Default(4)
	if err != nil {
		b.Fatal(err)
	}
	s0, s := m.NewState(), m.NewState()
	m.Start(s0, nil)
	m.CopyState(s, s0)
	u := make([]int, m.Robots())
	rng := model.NewRNG(1)
	b.ReportAllocs()
	t := 0
	for b.Loop() {
		if t == m.Horizon() {
			m.CopyState(s, s0)
			t = 0
		}
		model.BaseJoint(m, s, u)
		m.Step(s, u, rng.Rand)
		t++
	}
	b.ReportMetric(float64(b.N*m.Robots())/b.Elapsed().Seconds(), "robot-steps/s")
}
