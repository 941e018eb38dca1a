package learn

import (
	"bytes"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"

	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// TestGradientMatchesFiniteDifferences compares backpropagation with
// central finite differences of the full objective (masked cross-entropy
// plus weight decay) on a tiny two-hidden-layer net: common practice for
// catching a wrong sign or a missing term in a hand-written backward pass.
func TestGradientMatchesFiniteDifferences(t *testing.T) {
	for _, act := range []Activation{Tanh, ReLU} {
		t.Run(act.String(), func(t *testing.T) {
			const inputs, classes, samples = 4, 4, 6
			n := newNet(inputs, []int{5, 3}, classes, act)
			rng := rand.New(rand.NewPCG(3, 4))
			n.initWeights(rng)
			for i := range n.params {
				n.params[i] += 0.2 * rng.NormFloat64() // biases too, so every term is exercised
			}
			zs := make([][]float64, samples)
			ys := make([]int, samples)
			masks := make([][]bool, samples)
			for i := range samples {
				zs[i] = make([]float64, inputs)
				for j := range zs[i] {
					zs[i][j] = rng.NormFloat64()
				}
				masks[i] = []bool{true, true, i%2 == 0, i%3 != 1} // some controls invalid
				for {
					ys[i] = rng.IntN(classes)
					if masks[i][ys[i]] {
						break
					}
				}
			}
			get := func(i int) ([]float64, int, []bool) { return zs[i], ys[i], masks[i] }
			idx := []int{0, 1, 2, 3, 4, 5}
			tr := newTrainer(n, 0.05)
			tr.batch(idx, get)
			grad := slices.Clone(tr.grad)

			const h = 1e-5
			worst := 0.0
			for i := range n.params {
				orig := n.params[i]
				n.params[i] = orig + h
				fp := tr.batch(idx, get)
				n.params[i] = orig - h
				fm := tr.batch(idx, get)
				n.params[i] = orig
				num := (fp - fm) / (2 * h)
				rel := math.Abs(num-grad[i]) / math.Max(math.Abs(num)+math.Abs(grad[i]), 1e-4)
				worst = max(worst, rel)
				if rel >= 1e-6 {
					t.Errorf("param %d: backprop %.10g, finite difference %.10g (relative error %.2g)", i, grad[i], num, rel)
				}
			}
			t.Logf("%d parameters, worst relative error %.2g", len(n.params), worst)
		})
	}
}

func TestTrainingIsDeterministic(t *testing.T) {
	fx := getFixture(t, "harbor")
	cfg := TrainConfig{Seed: 11, Epochs: 4}
	a, _ := Train(fx.f, fx.train, cfg)
	b, _ := Train(fx.f, fx.train, cfg)
	cfg.Seed = 12
	c, _ := Train(fx.f, fx.train, cfg)
	ab, _ := a.Marshal(1)
	bb, _ := b.Marshal(1)
	cb, _ := c.Marshal(1)
	if !bytes.Equal(ab, bb) {
		t.Fatal("two trainings with one seed gave different model files")
	}
	if bytes.Equal(ab, cb) {
		t.Fatal("a different seed gave the same model file")
	}
	t.Logf("model file: %d bytes (%d inputs, hidden %v, %d outputs)", len(ab), a.Inputs(), a.meta.Hidden, a.Outputs())
}

// The real runs: imitation must clearly beat the best constant guess on
// held-out episodes.
func TestImitationBeatsMajority(t *testing.T) {
	for _, name := range []string{"harbor", "upkeep"} {
		t.Run(name, func(t *testing.T) {
			fx := getFixture(t, name)
			acc := fx.net.Accuracy(fx.test)
			maj := fx.test.MajorityRate()
			t.Logf("%s: %d samples from %d episodes (train %d, test %d from %d held-out episodes); "+
				"train accuracy %.3f, held-out accuracy %.3f, held-out majority rate %.3f, label counts %v",
				name, fx.all.Len(), fx.all.Episodes(), fx.train.Len(), fx.test.Len(), fx.test.Episodes(),
				fx.rep.TrainAccuracy, acc, maj, fx.all.ClassCounts())
			if fx.test.Len() < 200 {
				t.Fatalf("only %d held-out samples", fx.test.Len())
			}
			if acc < maj+0.15 {
				t.Errorf("held-out accuracy %.3f is not clearly above the majority rate %.3f", acc, maj)
			}
			if m := fx.net.Meta(); m.TestAccuracy != acc || m.TestSamples != fx.test.Len() {
				t.Errorf("NoteHeldOut recorded %+v", m)
			}
		})
	}
}

func TestSplitKeepsEpisodesWhole(t *testing.T) {
	fx := getFixture(t, "harbor")
	d := fx.all
	tr, te := d.Split(0.25, 3)
	if tr.Len()+te.Len() != d.Len() {
		t.Fatalf("split lost samples: %d + %d != %d", tr.Len(), te.Len(), d.Len())
	}
	seen := map[int]string{}
	for _, e := range tr.episode {
		seen[e] = "train"
	}
	for _, e := range te.episode {
		if seen[e] == "train" {
			t.Fatalf("episode %d on both sides", e)
		}
	}
	if te.Episodes() != 8 || tr.Episodes() != 22 { // round(0.25*30)
		t.Errorf("episodes train %d, test %d", tr.Episodes(), te.Episodes())
	}
	tr2, te2 := d.Split(0.25, 3)
	if !slices.Equal(te.episode, te2.episode) || !slices.Equal(tr.y, tr2.y) {
		t.Error("Split is not deterministic for a seed")
	}
	_, te3 := d.Split(0.25, 4)
	if slices.Equal(te.episode, te3.episode) {
		t.Error("another seed held out the same episodes")
	}
}

func TestFeaturizerFor(t *testing.T) {
	hm, _ := harbor.Default(4)
	um, _ := upkeep.Default(3)
	hf, err := FeaturizerFor(hm)
	if err != nil || hf.Size() != 59 || hf.Scenario() != "harbor" || hf.Version() != "harbor.2" {
		t.Fatalf("harbor: %v %v", hf, err)
	}
	uf, err := FeaturizerFor(um)
	if err != nil || uf.Size() != 13+9*(um.MaxControls()-1) || uf.Scenario() != "upkeep" {
		t.Fatalf("upkeep: %v %v", uf, err)
	}
	if th := uf.(*upkeepFeatures).thresh; th != 2 {
		t.Errorf("probed threshold level %d, the solar park sets 2", th)
	}
	if _, err := FeaturizerFor(renamed{hm}); err == nil || !strings.Contains(err.Error(), `"orchard"`) {
		t.Errorf("unknown scenario: %v", err)
	}

	// At the dock every boat sees the same state: only the position tells
	// the turns apart, so it must change the vector.
	x := hm.NewState()
	hm.Start(x, model.NewRNG(1).Rand)
	a, b := make([]float64, hf.Size()), make([]float64, hf.Size())
	hf.Features(x, 0, 0, nil, a)
	hf.Features(x, 1, 1, nil, b)
	if slices.Equal(a, b) {
		t.Error("positions 0 and 1 at the dock give the same features")
	}
	hf.Features(x, 1, 0, nil, b)
	if !slices.Equal(a, b) {
		t.Error("two boats on the dock at the same position should look alike")
	}
	for _, v := range a {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			t.Fatalf("non-finite feature in %v", a)
		}
	}
}

// renamed is a scenario FeaturizerFor does not know.
type renamed struct{ model.Model }

func (renamed) Name() string { return "orchard" }

func TestAsBase(t *testing.T) {
	fx := getFixture(t, "harbor")
	m := fx.m
	lb := AsBase(m, fx.net)
	if _, ok := lb.(model.TerminalCoster); !ok {
		t.Error("learned base lost TerminalCost")
	}
	if _, ok := lb.(model.ControlNamer); !ok {
		t.Error("learned base lost ControlName")
	}
	if _, ok := lb.(model.Enumerable); ok {
		t.Error("learned base claims Enumerable")
	}
	if _, ok := lb.(model.Fleet); ok {
		t.Error("learned base claims Fleet")
	}
	tc := m.(model.TerminalCoster)
	for _, x := range fx.states {
		for r := range m.Robots() {
			if got, want := lb.Base(x, r), fx.net.Predict(x, r, r); got != want {
				t.Fatalf("Base(x, %d) = %d, Predict(x, %d, %d) = %d", r, got, r, r, want)
			}
		}
		if lb.(model.TerminalCoster).TerminalCost(x) != tc.TerminalCost(x) {
			t.Fatal("TerminalCost differs")
		}
	}
	if lb.(model.ControlNamer).ControlName(fx.states[0], 0, 3) != "E" {
		t.Error("ControlName not passed through")
	}
	if lb.Name() != m.Name() || lb.Robots() != m.Robots() || lb.MaxControls() != m.MaxControls() {
		t.Error("AsBase changed the model's shape")
	}
	// Re-wrapping replaces the base instead of stacking wrappers.
	if inner := AsBase(lb, fx.net).(learnedBase).inner(); inner != m {
		t.Errorf("AsBase on a learned base wraps %T", inner)
	}
	// Without the optional interfaces, none are claimed.
	plain := AsBase(plainModel{m}, fx.net)
	if _, ok := plain.(model.TerminalCoster); ok {
		t.Error("claims TerminalCost the model lacks")
	}
	if _, ok := plain.(model.ControlNamer); ok {
		t.Error("claims ControlName the model lacks")
	}

	// Next iteration of approximate policy iteration: rollout on the learned
	// base, reproducibly.
	d1, err := Collect(m, testRollout, 2, 5, lb)
	if err != nil {
		t.Fatal(err)
	}
	d2, _ := Collect(m, testRollout, 2, 5, lb)
	if d1.Len() == 0 || !slices.Equal(d1.y, d2.y) || !slices.Equal(d1.x, d2.x) {
		t.Error("Collect on a learned base is not reproducible")
	}
	if _, err := Collect(m, testRollout, 1, 5, getFixture(t, "upkeep").m); err == nil {
		t.Error("Collect accepted a base model of another scenario")
	}
}

// plainModel hides every optional interface of the scenario.
type plainModel struct{ model.Model }

// On-policy aggregation: CollectOnPolicy labels the states a parallel
// fleet guessing with the net visits, replays exactly for a seed, and
// appends to earlier data with its episodes numbered after them; per
// position accuracy covers every position in the order.
func TestCollectOnPolicy(t *testing.T) {
	for _, name := range []string{"harbor", "upkeep"} {
		fx := getFixture(t, name)
		a, err := CollectOnPolicy(fx.m, testRollout, fx.net, 2, 9, nil)
		if err != nil {
			t.Fatal(err)
		}
		b, _ := CollectOnPolicy(fx.m, testRollout, fx.net, 2, 9, nil)
		if a.Len() == 0 || !slices.Equal(a.x, b.x) || !slices.Equal(a.y, b.y) {
			t.Fatalf("%s: %d samples, replayed equal: %v", name, a.Len(), slices.Equal(a.y, b.y))
		}
		all := fx.all.emptyLike()
		for i := range fx.all.Len() {
			all.appendFrom(fx.all, i)
		}
		all.episodes = fx.all.episodes
		n, eps := all.Len(), all.episodes
		if err := all.Append(a); err != nil {
			t.Fatal(err)
		}
		if all.Len() != n+a.Len() || all.episodes != eps+2 || all.episode[n] != eps {
			t.Fatalf("%s: appended %d samples to %d: %d, episodes %d", name, a.Len(), n, all.Len(), all.episodes)
		}
		byPos := fx.net.AccuracyByPosition(fx.test)
		if len(byPos) != fx.m.Robots() {
			t.Fatalf("%s: accuracy at %d positions, %d robots", name, len(byPos), fx.m.Robots())
		}
		t.Logf("%s: held-out accuracy by position %.3f", name, byPos)
	}
}
