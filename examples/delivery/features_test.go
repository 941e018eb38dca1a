package delivery

import (
	"math"
	"testing"

	"baton/agentd/decide"
	"baton/signal/learn"
	"baton/sim/model"
)

// The registration reaches Baton: learn finds the features by scenario
// name, as sim train, agentd's --guess-model and the coordinator do.
func TestFeaturesRegistered(t *testing.T) {
	m := mustDefault(t, 4)
	f, err := learn.FeaturizerFor(m)
	if err != nil {
		t.Fatal(err)
	}
	if _, ok := f.(*Features); !ok || f.Scenario() != "delivery" || f.Version() != "delivery.1" || f.Size() != 28+6*5 {
		t.Fatalf("%T %s %s %d", f, f.Scenario(), f.Version(), f.Size())
	}
	if _, err := NewFeatures(nil); err == nil {
		t.Error("features for a nil model")
	}
}

func TestFeatures(t *testing.T) {
	m := mustDefault(t, 4)
	f, _ := NewFeatures(m)
	s := start(m) // every robot at the hub, nothing on board
	dst := make([]float64, f.Size())
	fill := func() {
		for i := range dst {
			dst[i] = math.NaN()
		}
	}
	fill()
	f.Features(s, 1, 1, []int{1, -1, -1, -1}, dst) // robot 0 known to drive to the mill
	for i, v := range dst {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			t.Fatalf("input %d is %g: dst must be fully overwritten with finite values", i, v)
		}
	}
	if dst[fPos] != 0.25 || dst[fPos+2] != 1 || dst[fPos+1] != 0 || dst[fKnown] != 1 {
		t.Errorf("position %v, known %g", dst[fPos:fPos+5], dst[fKnown])
	}
	// Robots 2 and 3 share the hub; robot 0 left for the mill.
	if dst[fShare] != 0.5 || dst[fLoaded] != 0 {
		t.Errorf("share %g loaded %g", dst[fShare], dst[fLoaded])
	}
	// Control 1 (to the mill) is where robot 0 goes, and the base choice.
	mv1 := dst[fMoves+moveSize:]
	if mv1[0] != 1 || mv1[1] != 1 || mv1[5] != 0.25 {
		t.Errorf("move 1: %v", mv1[:moveSize])
	}
	// The hub has 2 roads: controls 3 and 4 are not valid there.
	if dst[fMoves+3*moveSize] != 0 || dst[fMoves+4*moveSize] != 0 {
		t.Error("invalid controls marked valid")
	}
	// Nearest waiting parcel: the market's, 2 hops, 4 to the right.
	if sl := dst[fNear:]; sl[0] != 1 || sl[1] != 0.4 || sl[3] != 2.0/f.(*Features).diam {
		t.Errorf("nearest parcel slot %v", sl[:slotSize])
	}
	// Pull: both moves bring waiting parcels nearer than staying.
	if mv1[3] <= 0 || dst[fMoves+2*moveSize+3] <= 0 {
		t.Errorf("pull of moves 1, 2: %g %g", mv1[3], dst[fMoves+2*moveSize+3])
	}
	// Later turn positions share the last slot.
	fill()
	f.Features(s, 3, 7, nil, dst)
	if dst[fPos+1+posSlots-1] != 1 || dst[fKnown] != 0 {
		t.Errorf("position 7: %v", dst[fPos:fPos+5])
	}
	prior := []int{1, 2, -1, -1}
	allocs := testing.AllocsPerRun(500, func() { f.Features(s, 2, 2, prior, dst) })
	if allocs != 0 {
		t.Errorf("Features allocates %g times", allocs)
	}
}

// Learned guesses end to end on a small run: collect rollout's choices,
// train, write the model file, read it back for this instance and guess.
func TestLearnedGuesses(t *testing.T) {
	m := mustDefault(t, 3)
	d, err := learn.Collect(m, decide.Config{Samples: 4, Horizon: 6}, 3, 1, nil)
	if err != nil {
		t.Fatal(err)
	}
	f, _ := learn.FeaturizerFor(m)
	net, rep := learn.Train(f, d, learn.TrainConfig{Epochs: 8, Seed: 1})
	data, err := net.Marshal(1)
	if err != nil {
		t.Fatal(err)
	}
	got, meta, err := learn.Check(data, m)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("%d samples, train accuracy %.2f (majority %.2f), %d parameters", rep.Samples, rep.TrainAccuracy, d.MajorityRate(), rep.Params)
	if meta.Scenario != "delivery" || meta.FeatureVersion != "delivery.1" || rep.TrainAccuracy < d.MajorityRate() {
		t.Errorf("meta %s %s, accuracy %.2f below the majority rate %.2f", meta.Scenario, meta.FeatureVersion, rep.TrainAccuracy, d.MajorityRate())
	}
	// Guess along a base episode. learn masks controls invalid at a state
	// only for its built-in scenarios (it finds the model through an
	// unexported method), so a registered scenario can get a guess past
	// its station's degree: Step treats it as stay. Count them.
	s := start(m)
	u := make([]int, 3)
	rng := model.NewRNG(2)
	invalid, guesses := 0, 0
	for range 40 {
		for r := range 3 {
			c := got.Predict(s, r, r)
			if c < 0 || c >= m.MaxControls() {
				t.Fatalf("guess %d outside 0..%d", c, m.MaxControls()-1)
			}
			guesses++
			if c >= m.NumControls(s, r) {
				invalid++
			}
		}
		model.BaseJoint(m, s, u)
		m.Step(s, u, rng.Rand)
	}
	t.Logf("%d of %d guesses past the robot's station degree", invalid, guesses)
}
