// Package herding_test measures the herding case of signaling: boats that
// all launch from one dock and decide in parallel. With base-policy guesses
// every boat assumes the others follow the base policy, makes the same best
// response, and the group chases one slick after another; guesses from a
// learned imitation of the rollout policy should keep most of the
// sequential (one-at-a-time) coordination.
package herding_test

import (
	"fmt"
	"os"
	"testing"
	"time"

	"baton/agentd/decide"
	"baton/signal"
	"baton/signal/learn"
	"baton/sim/episode"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// effort is the fleet's Monte Carlo effort for training and for play.
var effort = decide.Config{Samples: 8, Horizon: 15}

const (
	trainSeed = 101 // training episodes; evaluation uses other seeds
	evalSeed  = 202
)

// fleet plays harbor episodes.
type fleet struct {
	m     model.Model
	d     *decide.Decider
	order []int
	none  []int // nothing heard: all -1
	known []int
	u     []int
}

// way is how the fleet decides a step.
type way struct {
	sequential bool          // one-at-a-time rollout: every predecessor heard
	guess      signal.Source // parallel: every predecessor guessed by this
	// neither: the base policy, no rollout (for reference)
}

// decideJoint writes this step's joint control into f.u.
func (f *fleet) decideJoint(x model.State, step int, fleetSeed uint64, w way) {
	switch {
	case w.sequential:
		f.d.OneAtATime(x, f.order, fleetSeed, step, f.u)
	case w.guess != nil:
		for k, r := range f.order {
			c := &signal.Context{X: x, Round: uint64(step), Order: f.order, Robot: r, Known: f.none,
				Seed: fleetSeed, Decide: effort}
			copy(f.known, f.none)
			w.guess.Fill(c, f.order[:k], f.known)
			f.u[r], _ = f.d.Turn(x, r, f.known, decide.TurnSeed(fleetSeed, step, r))
		}
	default:
		model.BaseJoint(f.m, x, f.u)
	}
}

// play is one episode's discounted cost; every way of deciding sees the
// same start, world disturbances and fleet seed for an episode seed.
func (f *fleet) play(es uint64, w way) float64 {
	m := f.m
	x := m.NewState()
	episode.Start(m, es, x)
	fleetSeed := episode.FleetSeed(es)
	rng := model.NewRNG(0)
	cost, disc := 0.0, 1.0
	for step := 1; step <= m.Horizon() && !m.Terminal(x); step++ {
		f.decideJoint(x, step, fleetSeed, w)
		rng.Reseed(episode.WorldSeed(es, step))
		cost += disc * m.Step(x, f.u, rng.Rand)
		disc *= m.Discount()
	}
	return cost
}

// sizes: the default run is small but seeded; BATON_HERDING_LONG=1 runs
// the long version.
func sizes() (train, eval int) {
	if os.Getenv("BATON_HERDING_LONG") != "" {
		return 120, 1000
	}
	return 60, 200
}

func TestHerdingLearnedGuessesRecoverCoordination(t *testing.T) {
	m, err := harbor.Default(4) // every boat starts at the dock
	if err != nil {
		t.Fatal(err)
	}
	nTrain, nEval := sizes()
	t0 := time.Now()
	data, err := learn.Collect(m, effort, nTrain, trainSeed, nil)
	if err != nil {
		t.Fatal(err)
	}
	feat, err := learn.FeaturizerFor(m)
	if err != nil {
		t.Fatal(err)
	}
	net, rep := learn.Train(feat, data, trainConfig())
	t.Logf("classifier: %d samples from %d episodes, train accuracy %.3f (majority %.3f), %v",
		rep.Samples, nTrain, rep.TrainAccuracy, data.MajorityRate(), time.Since(t0).Round(time.Millisecond))
	for it := 1; it <= daggerIterations(); it++ {
		more, err := learn.CollectOnPolicy(m, effort, net, nTrain, trainSeed+uint64(it), nil)
		if err != nil {
			t.Fatal(err)
		}
		if err := data.Append(more); err != nil {
			t.Fatal(err)
		}
		net, rep = learn.Train(feat, data, trainConfig())
		t.Logf("DAgger %d: %d samples, train accuracy %.3f, %v", it, rep.Samples, rep.TrainAccuracy, time.Since(t0).Round(time.Millisecond))
	}

	base, _ := signal.New("base", m, signal.Options{})
	learned, _ := signal.New("learned", m, signal.Options{Classifier: net})
	checked := signal.NewChecked(m, net, confidence(), 0)
	f := &fleet{m: m, d: decide.New(m, effort), order: []int{0, 1, 2, 3},
		none: []int{-1, -1, -1, -1}, known: make([]int, m.Robots()), u: make([]int, m.Robots())}
	var seq, par, parLearned, parChecked, basePol []float64
	t1 := time.Now()
	for i := range nEval {
		es := episode.Seed(evalSeed, i)
		seq = append(seq, f.play(es, way{sequential: true}))
		par = append(par, f.play(es, way{guess: base}))
		parLearned = append(parLearned, f.play(es, way{guess: learned}))
		parChecked = append(parChecked, f.play(es, way{guess: checked}))
		basePol = append(basePol, f.play(es, way{}))
	}
	t.Logf("%d episodes x 4 ways in %v", nEval, time.Since(t1).Round(time.Millisecond))

	ci := func(xs []float64) string {
		mean, half := episode.MeanCI95(xs)
		return fmt.Sprintf("%7.2f ± %5.2f", mean, half)
	}
	diff := func(a, b []float64) []float64 {
		d := make([]float64, len(a))
		for i := range a {
			d[i] = a[i] - b[i]
		}
		return d
	}
	t.Logf("base policy (no rollout)    %s", ci(basePol))
	t.Logf("sequential (one-at-a-time)  %s", ci(seq))
	t.Logf("parallel, base guesses      %s", ci(par))
	t.Logf("parallel, learned guesses   %s", ci(parLearned))
	p := checked.Paths()
	t.Logf("parallel, checked guesses   %s (confidence %.2f: %d sure, %d recomputed, %d fell back: %.1f%% of guesses recomputed)",
		ci(parChecked), confidence(), p.Confident, p.Recomputed, p.FellBack, 100*float64(p.Recomputed)/float64(p.Confident+p.Recomputed+p.FellBack))
	cr, crHalf := episode.RatioCI95(diff(par, parChecked), diff(par, seq))
	t.Logf("checked retains %.3f ± %.3f", cr, crHalf)
	if cr < retainedLearned(par, parLearned, seq) {
		t.Errorf("recomputing weak guesses retained less (%.3f) than learned alone", cr)
	}

	gap := diff(par, seq)
	gain := diff(parLearned, par)
	gapMean, gapHalf := episode.MeanCI95(gap)
	gainMean, gainHalf := episode.MeanCI95(gain)
	t.Logf("paired: base-par - seq %s; learned-par - base-par %s", ci(gap), ci(gain))
	if gapMean-gapHalf <= 0 {
		t.Errorf("parallel with base guesses is not clearly worse than sequential: paired difference %s", ci(gap))
	}
	if gainMean+gainHalf >= 0 {
		t.Errorf("learned guesses are not clearly better than base guesses in parallel: paired difference %s", ci(gain))
	}
	retained, rHalf := episode.RatioCI95(gain, gap)
	retained = -retained
	t.Logf("retained = (J_base_par - J_learned_par) / (J_base_par - J_seq) = %.3f ± %.3f (delta method)", retained, rHalf)
	// Target: 0.85 (state-only features without on-policy data kept
	// 0.65; see signal/learn's package comment for each step's share).
	if retained < 0.85 {
		t.Errorf("learned guesses retain %.3f of the coordination, want >= 0.85", retained)
	}
}

// daggerIterations: rounds of on-policy data aggregation (BATON_DAGGER
// overrides, as BATON_HIDDEN and BATON_EPOCHS do the net's size and
// training, for measuring each change).
func daggerIterations() int {
	if v := os.Getenv("BATON_DAGGER"); v != "" {
		n := 0
		fmt.Sscan(v, &n)
		return n
	}
	return 3
}

func trainConfig() learn.TrainConfig {
	c := learn.TrainConfig{Seed: 1, Hidden: []int{64}}
	if v := os.Getenv("BATON_HIDDEN"); v != "" {
		n := 0
		fmt.Sscan(v, &n)
		c.Hidden = []int{n}
	}
	if v := os.Getenv("BATON_EPOCHS"); v != "" {
		fmt.Sscan(v, &c.Epochs)
	}
	return c
}

func confidence() float64 {
	if v := os.Getenv("BATON_CONFIDENCE"); v != "" {
		c := 0.0
		fmt.Sscan(v, &c)
		return c
	}
	return signal.DefaultConfidence
}

func retainedLearned(par, learned, seq []float64) float64 {
	gain, gap := make([]float64, len(par)), make([]float64, len(par))
	for i := range par {
		gain[i], gap[i] = par[i]-learned[i], par[i]-seq[i]
	}
	r, _ := episode.RatioCI95(gain, gap)
	return r
}

// The same on upkeep: robots that all leave from the depot site, deciding
// in parallel.
func TestUpkeepDepotLearnedGuesses(t *testing.T) {
	m, err := upkeep.Default(3) // every robot starts at the depot
	if err != nil {
		t.Fatal(err)
	}
	eff := decide.Config{Samples: 6, Horizon: 10}
	nTrain, nEval := 30, 120
	if os.Getenv("BATON_HERDING_LONG") != "" {
		nTrain, nEval = 60, 400
	}
	t0 := time.Now()
	data, err := learn.Collect(m, eff, nTrain, trainSeed, nil)
	if err != nil {
		t.Fatal(err)
	}
	feat, _ := learn.FeaturizerFor(m)
	net, _ := learn.Train(feat, data, trainConfig())
	for it := 1; it <= upkeepDagger(); it++ {
		more, err := learn.CollectOnPolicy(m, eff, net, nTrain, trainSeed+uint64(it), nil)
		if err != nil {
			t.Fatal(err)
		}
		if err := data.Append(more); err != nil {
			t.Fatal(err)
		}
		net, _ = learn.Train(feat, data, trainConfig())
	}
	t.Logf("classifier: %d samples, %v", data.Len(), time.Since(t0).Round(time.Millisecond))
	base, _ := signal.New("base", m, signal.Options{})
	learned, _ := signal.New("learned", m, signal.Options{Classifier: net})
	order := []int{0, 1, 2}
	f := &fleet{m: m, d: decide.New(m, eff), order: order, none: []int{-1, -1, -1}, known: make([]int, 3), u: make([]int, 3)}
	saved := effort
	effort = eff // the fleet's guess context carries it
	defer func() { effort = saved }()
	var seq, par, parLearned []float64
	for i := range nEval {
		es := episode.Seed(evalSeed, i)
		seq = append(seq, f.play(es, way{sequential: true}))
		par = append(par, f.play(es, way{guess: base}))
		parLearned = append(parLearned, f.play(es, way{guess: learned}))
	}
	for _, l := range []struct {
		name string
		xs   []float64
	}{{"sequential", seq}, {"parallel, base guesses", par}, {"parallel, learned guesses", parLearned}} {
		mean, half := episode.MeanCI95(l.xs)
		t.Logf("%-26s %7.2f ± %5.2f", l.name, mean, half)
	}
	gain, gap := make([]float64, nEval), make([]float64, nEval)
	for i := range gain {
		gain[i], gap[i] = par[i]-parLearned[i], par[i]-seq[i]
	}
	gm, gh := episode.MeanCI95(gain)
	r, rh := episode.RatioCI95(gain, gap)
	t.Logf("retained %.3f ± %.3f (%d rounds of on-policy data)", r, rh, upkeepDagger())
	if gm-gh <= 0 {
		t.Errorf("learned guesses are not clearly better than base guesses in parallel: paired gain %.2f ± %.2f", gm, gh)
	}
	if r < 0.8 {
		t.Errorf("learned guesses retain %.3f on upkeep, want >= 0.8", r)
	}
}

func upkeepDagger() int {
	if v := os.Getenv("BATON_UPKEEP_DAGGER"); v != "" {
		n := 0
		fmt.Sscan(v, &n)
		return n
	}
	return 1
}
