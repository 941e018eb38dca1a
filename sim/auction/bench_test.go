package auction

import (
	"testing"

	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// The auction as rollout's base policy runs at every simulated step: one
// auction for the whole fleet per call.
func BenchmarkBaseAllHarbor(b *testing.B) {
	m, _ := harbor.Default(4)
	benchBaseAll(b, m, model.NewRNG(9))
}

func BenchmarkBaseAllUpkeep(b *testing.B) {
	m, _ := upkeep.Default(4)
	benchBaseAll(b, m, model.NewRNG(9))
}

func benchBaseAll(b *testing.B, m model.Model, rng *model.RNG) {
	w, err := Wrap(m, Config{})
	if err != nil {
		b.Fatal(err)
	}
	jb := w.(model.JointBaser)
	s0, s := m.NewState(), m.NewState()
	m.Start(s0, rng.Rand)
	m.CopyState(s, s0)
	u := make([]int, m.Robots())
	b.ReportAllocs()
	t := 0
	for b.Loop() {
		if t == 20 || m.Terminal(s) {
			m.CopyState(s, s0)
			t = 0
		}
		jb.BaseAll(s, u)
		m.Step(s, u, rng.Rand)
		t++
	}
}
