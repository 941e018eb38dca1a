package learn

import (
	"sync"
	"testing"

	"baton/agentd/decide"
	"baton/sim/episode"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// fixture is one scenario with imitation data and a net trained on it,
// built once and shared by the tests and benchmarks that need a real net.
type fixture struct {
	m           model.Model
	f           Featurizer
	all         *Dataset
	train, test *Dataset
	net         *Net
	rep         TrainReport
	states      []model.State // a spread of states along base-policy episodes
}

// Small rollout effort keeps collection fast; the labels are noisier than
// a fleet's, which only makes the accuracy bar harder to clear.
var testRollout = decide.Config{Samples: 6, Horizon: 10}

var (
	fixMu    sync.Mutex
	fixtures = map[string]*fixture{}
)

func getFixture(tb testing.TB, name string) *fixture {
	tb.Helper()
	fixMu.Lock()
	defer fixMu.Unlock()
	if fx := fixtures[name]; fx != nil {
		return fx
	}
	var m model.Model
	var err error
	episodes := 0
	switch name {
	case "harbor":
		m, err = harbor.Default(4)
		episodes = 30 // short episodes (all slicks collected in ~15 steps)
	case "upkeep":
		m, err = upkeep.Default(3)
		episodes = 8 // 100 steps each
	}
	if err != nil {
		tb.Fatal(err)
	}
	fx := &fixture{m: m}
	if fx.f, err = FeaturizerFor(m); err != nil {
		tb.Fatal(err)
	}
	if fx.all, err = Collect(m, testRollout, episodes, 1, nil); err != nil {
		tb.Fatal(err)
	}
	fx.train, fx.test = fx.all.Split(0.25, 7)
	fx.net, fx.rep = Train(fx.f, fx.train, TrainConfig{Seed: 1})
	fx.net.NoteHeldOut(fx.test)
	fx.states = sampleStates(m, 4, 5)
	fixtures[name] = fx
	return fx
}

// sampleStates keeps every every-th state of a few base-policy episodes.
func sampleStates(m model.Model, episodes, every int) []model.State {
	var out []model.State
	x := m.NewState()
	u := make([]int, m.Robots())
	rng := model.NewRNG(0)
	for ep := range episodes {
		es := episode.Seed(42, ep)
		episode.Start(m, es, x)
		for step := 1; step <= m.Horizon() && !m.Terminal(x); step++ {
			if step%every == 1 {
				c := m.NewState()
				m.CopyState(c, x)
				out = append(out, c)
			}
			model.BaseJoint(m, x, u)
			rng.Reseed(episode.WorldSeed(es, step))
			m.Step(x, u, rng.Rand)
		}
	}
	return out
}
