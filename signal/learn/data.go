package learn

import (
	"errors"
	"fmt"
	"math"
	"slices"

	"baton/agentd/decide"
	"baton/sim/episode"
	"baton/sim/model"
)

// Dataset is imitation data: one sample per (state, robot) with the
// features, the rollout's control and the controls valid there.
type Dataset struct {
	scenario string
	version  string
	robots   int
	inputs   int
	classes  int
	episodes int // episodes the samples came from

	x       []float64 // len*inputs
	y       []int
	valid   []bool // len*classes
	episode []int  // episode index of each sample
	pos     []int  // position in the turn order of each sample
}

// Len is the number of samples.
func (d *Dataset) Len() int { return len(d.y) }

// Inputs is the feature length of every sample.
func (d *Dataset) Inputs() int { return d.inputs }

// Classes is the number of control indices (the model's MaxControls).
func (d *Dataset) Classes() int { return d.classes }

// Episodes is the number of distinct episodes the samples came from.
func (d *Dataset) Episodes() int { return d.episodes }

// Scenario is the scenario the samples come from.
func (d *Dataset) Scenario() string { return d.scenario }

func (d *Dataset) row(i int) []float64 { return d.x[i*d.inputs : (i+1)*d.inputs] }
func (d *Dataset) mask(i int) []bool   { return d.valid[i*d.classes : (i+1)*d.classes] }

// Label is sample i's recorded control.
func (d *Dataset) Label(i int) int { return d.y[i] }

// ClassCounts is how often each control is the label.
func (d *Dataset) ClassCounts() []int {
	c := make([]int, d.classes)
	for _, y := range d.y {
		c[y]++
	}
	return c
}

// MajorityRate is the share of the most common label: the accuracy of the
// best constant guess, the floor a classifier has to clear.
func (d *Dataset) MajorityRate() float64 {
	if d.Len() == 0 {
		return 0
	}
	best := 0
	for _, c := range d.ClassCounts() {
		best = max(best, c)
	}
	return float64(best) / float64(d.Len())
}

func (d *Dataset) emptyLike() *Dataset {
	return &Dataset{scenario: d.scenario, version: d.version, robots: d.robots, inputs: d.inputs, classes: d.classes}
}

func (d *Dataset) appendFrom(src *Dataset, i int) {
	d.x = append(d.x, src.row(i)...)
	d.y = append(d.y, src.y[i])
	d.valid = append(d.valid, src.mask(i)...)
	d.episode = append(d.episode, src.episode[i])
	d.pos = append(d.pos, src.pos[i])
}

// Collect plays episodes seeded episodes of m under one-at-a-time rollout
// with Monte Carlo effort p and records every robot's turn (robot k at
// position k, order 0..m-1) as a sample. The rollout simulates with base's
// base policy: base is m itself (nil means m) or m wrapped by AsBase, for
// the next round of approximate policy iteration. Episode i uses
// episode.Seed(seed, i) for its start, world and fleet seeds, so a run
// replays exactly.
func Collect(m model.Model, p decide.Config, episodes int, seed uint64, base model.Model) (*Dataset, error) {
	return collect(m, p, episodes, seed, base, nil)
}

// collect plays episodes of m and labels every state with one-at-a-time
// rollout on base (nil: m). The world carries out the labels, or, with
// act, the joint control act picks (it may use dec, the labeller).
func collect(m model.Model, p decide.Config, episodes int, seed uint64, base model.Model,
	act func(dec *decide.Decider, x model.State, fleet uint64, step int, u []int)) (*Dataset, error) {
	if episodes < 1 {
		return nil, errors.New("learn: collecting needs at least one episode")
	}
	if base == nil {
		base = m
	}
	if base.Name() != m.Name() || base.Robots() != m.Robots() || base.MaxControls() != m.MaxControls() {
		return nil, fmt.Errorf("learn: base model (%s, %d robots) does not match %s with %d robots",
			base.Name(), base.Robots(), m.Name(), m.Robots())
	}
	f, err := FeaturizerFor(m)
	if err != nil {
		return nil, err
	}
	robots := m.Robots()
	d := &Dataset{scenario: f.Scenario(), version: f.Version(), robots: robots, inputs: f.Size(), classes: m.MaxControls(), episodes: episodes}
	dec := decide.New(base, p)
	x := m.NewState()
	label, prior, u := make([]int, robots), make([]int, robots), make([]int, robots)
	rng := model.NewRNG(0)
	for ep := range episodes {
		es := episode.Seed(seed, ep)
		episode.Start(m, es, x)
		fleet := episode.FleetSeed(es)
		for step := 1; step <= m.Horizon() && !m.Terminal(x); step++ {
			dec.OneAtATime(x, nil, fleet, step, label)
			if err := d.record(m, f, x, label, prior, ep); err != nil {
				return nil, err
			}
			copy(u, label)
			if act != nil {
				act(dec, x, fleet, step, u)
			}
			rng.Reseed(episode.WorldSeed(es, step))
			m.Step(x, u, rng.Rand)
		}
	}
	return d, nil
}

// record adds one state's samples: robot k (position k, order 0..m-1)
// chose u[k] knowing robots 0..k-1's controls. prior is scratch.
func (d *Dataset) record(m model.Model, f Featurizer, x model.State, u, prior []int, ep int) error {
	for k := range d.robots {
		off := len(d.x)
		d.x = slices.Grow(d.x, d.inputs)[:off+d.inputs]
		for j := range prior {
			prior[j] = -1
			if j < k {
				prior[j] = u[j]
			}
		}
		f.Features(x, k, k, prior, d.x[off:])
		nc := m.NumControls(x, k)
		for c := range d.classes {
			d.valid = append(d.valid, c < nc)
		}
		if u[k] < 0 || u[k] >= nc {
			return fmt.Errorf("learn: rollout chose control %d of %d for robot %d", u[k], nc, k)
		}
		d.y = append(d.y, u[k])
		d.episode = append(d.episode, ep)
		d.pos = append(d.pos, k)
	}
	return nil
}

// Split holds out whole episodes: about testFrac of them (at least one of
// each side when there are two or more) chosen by seed, so test states come
// from trajectories training never saw.
func (d *Dataset) Split(testFrac float64, seed uint64) (train, test *Dataset) {
	train, test = d.emptyLike(), d.emptyLike()
	ids := map[int]bool{}
	var eps []int
	for _, e := range d.episode {
		if !ids[e] {
			ids[e] = true
			eps = append(eps, e)
		}
	}
	nTest := 0
	if testFrac > 0 && len(eps) > 0 {
		nTest = int(math.Round(testFrac * float64(len(eps))))
		if len(eps) >= 2 {
			nTest = min(max(nTest, 1), len(eps)-1)
		} else {
			nTest = min(nTest, 1)
		}
	}
	rng := model.NewRNG(model.Mix(seed, 0x5eed))
	rng.Shuffle(len(eps), func(i, j int) { eps[i], eps[j] = eps[j], eps[i] })
	held := map[int]bool{}
	for _, e := range eps[:nTest] {
		held[e] = true
	}
	for i := range d.Len() {
		if held[d.episode[i]] {
			test.appendFrom(d, i)
		} else {
			train.appendFrom(d, i)
		}
	}
	train.episodes, test.episodes = len(eps)-nTest, nTest
	return train, test
}

// CollectOnPolicy is one round of on-policy data aggregation (DAgger: Ross,
// Gordon & Bagnell, AISTATS 2011). It plays episodes with the fleet
// deciding in parallel mode, every robot guessing all its predecessors in
// order with net, so the states recorded are the ones such a fleet visits;
// at each it labels every robot's turn with what one-at-a-time rollout
// would choose there (given the true choices of the robots before it).
// Episode i uses episode.Seed(seed, i) like Collect; append the result to
// earlier data (Append) and retrain.
//
// base is the rollout's base policy as in Collect (nil: m).
func CollectOnPolicy(m model.Model, p decide.Config, net *Net, episodes int, seed uint64, base model.Model) (*Dataset, error) {
	if net == nil {
		return nil, errors.New("learn: CollectOnPolicy needs a net to guess with")
	}
	known := make([]int, m.Robots())
	// The fleet acts as a parallel one: robot k guesses robots 0..k-1 in
	// order, then takes its rollout turn.
	return collect(m, p, episodes, seed, base, func(dec *decide.Decider, x model.State, fleet uint64, step int, u []int) {
		for k := range u {
			net.GuessInOrder(m, x, k, known)
			u[k], _ = dec.Turn(x, k, known, decide.TurnSeed(fleet, step, k))
		}
	})
}

// Append adds o's samples to d, its episodes numbered after d's (both
// must come from one scenario and feature layout).
func (d *Dataset) Append(o *Dataset) error {
	if o.scenario != d.scenario || o.version != d.version || o.inputs != d.inputs || o.classes != d.classes {
		return fmt.Errorf("learn: cannot append %s/%s data to %s/%s data", o.scenario, o.version, d.scenario, d.version)
	}
	for i := range o.Len() {
		n := len(d.y)
		d.appendFrom(o, i)
		d.episode[n] = o.episode[i] + d.episodes
	}
	d.episodes += o.episodes
	return nil
}
