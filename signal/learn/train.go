package learn

import (
	"fmt"
	"math"
	"math/rand/v2"

	"gonum.org/v1/gonum/floats"
)

// TrainConfig sets the net and the optimiser. Zero fields take defaults.
type TrainConfig struct {
	// Hidden layer sizes, one or two layers (default [32]: small enough
	// that a guess costs well under a microsecond inside rollouts).
	Hidden []int
	// Activation of the hidden layers (default Tanh).
	Activation Activation
	// Epochs over the training set (default 30; the labels are noisy Monte
	// Carlo decisions, and longer runs fit the noise).
	Epochs int
	// LearningRate is Adam's initial step (default 0.003); it decays along a
	// half cosine to a tenth, so late epochs settle instead of bouncing.
	LearningRate float64
	// Batch is the minibatch size (default 32).
	Batch int
	// WeightDecay is the L2 coefficient on weights, not biases (default
	// 1e-3; negative means none).
	WeightDecay float64
	// Seed drives initialisation and shuffling.
	Seed uint64
	// CreatedBy tags the model file (default "baton signal/learn").
	CreatedBy string
}

func (c TrainConfig) withDefaults() TrainConfig {
	if len(c.Hidden) == 0 {
		c.Hidden = []int{32}
	}
	if c.Activation == 0 {
		c.Activation = Tanh
	}
	if c.Epochs <= 0 {
		c.Epochs = 30
	}
	if c.LearningRate <= 0 {
		c.LearningRate = 0.003
	}
	if c.Batch <= 0 {
		c.Batch = 32
	}
	if c.WeightDecay == 0 {
		c.WeightDecay = 1e-3
	} else if c.WeightDecay < 0 {
		c.WeightDecay = 0
	}
	if c.CreatedBy == "" {
		c.CreatedBy = "baton signal/learn"
	}
	return c
}

// TrainReport is what training did.
type TrainReport struct {
	Samples       int
	Params        int
	Epochs        int
	Steps         int       // optimiser steps
	Loss          []float64 // training objective (cross-entropy + decay) per epoch
	FinalLoss     float64
	TrainAccuracy float64
}

// Train fits a net imitating train's labels. It is deterministic for a seed
// (one goroutine, seeded initialisation and shuffling). It panics when the
// dataset was not made with f's layout, or on more than two hidden layers:
// both are programming errors.
func Train(f Featurizer, train *Dataset, cfg TrainConfig) (*Net, TrainReport) {
	cfg = cfg.withDefaults()
	if train.inputs != f.Size() || train.scenario != f.Scenario() || train.version != f.Version() {
		panic(fmt.Sprintf("learn: dataset (%s %s, %d inputs) does not match featurizer (%s %s, %d inputs)",
			train.scenario, train.version, train.inputs, f.Scenario(), f.Version(), f.Size()))
	}
	if len(cfg.Hidden) > 2 {
		panic("learn: at most two hidden layers")
	}
	for _, h := range cfg.Hidden {
		if h < 1 {
			panic("learn: hidden layer sizes must be positive")
		}
	}
	n := newNet(train.inputs, cfg.Hidden, train.classes, cfg.Activation)
	n.bind(f)
	n.meta.Scenario, n.meta.FeatureVersion = f.Scenario(), f.Version()
	n.meta.RobotsTrained = train.robots
	n.meta.CreatedBy = cfg.CreatedBy
	n.meta.Seed, n.meta.Samples, n.meta.Episodes = cfg.Seed, train.Len(), train.episodes
	n.meta.Epochs, n.meta.Batch = cfg.Epochs, cfg.Batch
	n.meta.LearningRate, n.meta.WeightDecay = cfg.LearningRate, cfg.WeightDecay

	rng := rand.New(rand.NewPCG(cfg.Seed, cfg.Seed^0x6a09e667f3bcc908))
	n.standardise(train)
	n.initWeights(rng)
	rep := TrainReport{Samples: train.Len(), Params: len(n.params), Epochs: cfg.Epochs}
	if train.Len() == 0 {
		return n, rep
	}

	// Standardise once; the optimiser then works on z directly.
	zs := make([]float64, len(train.x))
	for i := range train.Len() {
		row, z := train.row(i), zs[i*train.inputs:(i+1)*train.inputs]
		for j, v := range row {
			z[j] = (v - n.mean[j]) * n.scale[j]
		}
	}
	t := newTrainer(n, cfg.WeightDecay)
	opt := newAdam(len(n.params))
	order := make([]int, train.Len())
	for i := range order {
		order[i] = i
	}
	for ep := range cfg.Epochs {
		lr := cfg.LearningRate * (0.1 + 0.45*(1+math.Cos(math.Pi*float64(ep)/float64(cfg.Epochs))))
		rng.Shuffle(len(order), func(i, j int) { order[i], order[j] = order[j], order[i] })
		sum, batches := 0.0, 0
		for lo := 0; lo < len(order); lo += cfg.Batch {
			idx := order[lo:min(lo+cfg.Batch, len(order))]
			sum += t.batch(idx, func(i int) ([]float64, int, []bool) {
				return zs[i*train.inputs : (i+1)*train.inputs], train.y[i], train.mask(i)
			})
			opt.step(n.params, t.grad, lr)
			batches++
			rep.Steps++
		}
		rep.Loss = append(rep.Loss, sum/float64(batches))
	}
	rep.FinalLoss = rep.Loss[len(rep.Loss)-1]
	rep.TrainAccuracy = n.Accuracy(train)
	n.meta.FinalLoss, n.meta.TrainAccuracy = rep.FinalLoss, rep.TrainAccuracy
	return n, rep
}

// standardise sets the input transform from the data: centre each feature,
// scale by its spread; constant features (a one-hot never lit) keep scale 1
// and become 0.
func (n *Net) standardise(d *Dataset) {
	if d.Len() == 0 {
		return
	}
	for j := range d.inputs {
		mean := 0.0
		for i := range d.Len() {
			mean += d.x[i*d.inputs+j]
		}
		mean /= float64(d.Len())
		ss := 0.0
		for i := range d.Len() {
			v := d.x[i*d.inputs+j] - mean
			ss += v * v
		}
		sd := math.Sqrt(ss / float64(d.Len()))
		n.mean[j] = mean
		if sd > 1e-9 {
			n.scale[j] = 1 / sd
		} else {
			n.scale[j] = 1
		}
	}
}

// initWeights draws Glorot-uniform weights for tanh and He-normal ones for
// ReLU (the usual choices that keep activations from saturating or dying at
// the start); biases start at zero.
func (n *Net) initWeights(rng *rand.Rand) {
	for _, l := range n.layers {
		if n.act == ReLU {
			sd := math.Sqrt(2 / float64(l.in))
			for i := range l.w {
				l.w[i] = rng.NormFloat64() * sd
			}
		} else {
			a := math.Sqrt(6 / float64(l.in+l.out))
			for i := range l.w {
				l.w[i] = (2*rng.Float64() - 1) * a
			}
		}
		clear(l.b)
	}
}

// trainer holds the gradient and per-layer buffers of backpropagation.
type trainer struct {
	n      *Net
	lambda float64
	grad   []float64 // same layout as n.params
	gl     []layer   // views into grad
	acts   [][]float64
	delta  [][]float64 // d objective / d pre-activation, per layer
	probs  []float64
}

func newTrainer(n *Net, lambda float64) *trainer {
	t := &trainer{n: n, lambda: lambda, grad: make([]float64, len(n.params))}
	off := 0
	t.acts = append(t.acts, nil) // the input row itself
	for _, l := range n.layers {
		g := layer{in: l.in, out: l.out}
		g.w = t.grad[off : off+l.in*l.out]
		off += l.in * l.out
		g.b = t.grad[off : off+l.out]
		off += l.out
		t.gl = append(t.gl, g)
		t.acts = append(t.acts, make([]float64, l.out))
		t.delta = append(t.delta, make([]float64, l.out))
	}
	t.probs = make([]float64, n.Outputs())
	return t
}

// batch sets t.grad to the gradient of the minibatch objective
//
//	mean_i CE(softmax over valid controls of logits(z_i), y_i) + lambda/2 * sum W^2
//
// and returns the objective. get yields sample i's standardised input,
// label and valid mask.
func (t *trainer) batch(idx []int, get func(i int) ([]float64, int, []bool)) float64 {
	clear(t.grad)
	loss := 0.0
	for _, i := range idx {
		z, y, mask := get(i)
		loss += t.sample(z, y, mask)
	}
	inv := 1 / float64(len(idx))
	floats.Scale(inv, t.grad)
	loss *= inv
	if t.lambda > 0 {
		for li, l := range t.n.layers {
			floats.AddScaled(t.gl[li].w, t.lambda, l.w)
			loss += 0.5 * t.lambda * floats.Dot(l.w, l.w)
		}
	}
	return loss
}

// sample runs one forward and backward pass, adding the unscaled gradient
// of its cross-entropy into t.grad, and returns the cross-entropy.
func (t *trainer) sample(z []float64, y int, mask []bool) float64 {
	n := t.n
	if y < 0 || y >= len(mask) || !mask[y] {
		return 0 // cannot happen for Collect's data; never learn from it
	}
	t.acts[0] = z
	last := len(n.layers) - 1
	for li, l := range n.layers {
		in, out := t.acts[li], t.acts[li+1]
		for o := range l.out {
			out[o] = l.b[o] + floats.Dot(l.w[o*l.in:(o+1)*l.in], in)
		}
		if li < last {
			activate(n.act, out)
		}
	}
	// Masked softmax, shifted by the maximum for stability.
	logits := t.acts[last+1]
	mx := math.Inf(-1)
	for c, ok := range mask {
		if ok {
			mx = max(mx, logits[c])
		}
	}
	sum := 0.0
	for c, ok := range mask {
		if ok {
			t.probs[c] = math.Exp(logits[c] - mx)
			sum += t.probs[c]
		} else {
			t.probs[c] = 0
		}
	}
	d := t.delta[last]
	for c := range d {
		d[c] = t.probs[c] / sum
	}
	ce := -math.Log(d[y])
	d[y]--
	for li := last; li >= 0; li-- {
		l, g, in := n.layers[li], t.gl[li], t.acts[li]
		d := t.delta[li]
		for o, v := range d {
			if v == 0 {
				continue
			}
			floats.AddScaled(g.w[o*l.in:(o+1)*l.in], v, in)
			g.b[o] += v
		}
		if li == 0 {
			break
		}
		prev := t.delta[li-1]
		clear(prev)
		for o, v := range d {
			if v != 0 {
				floats.AddScaled(prev, v, l.w[o*l.in:(o+1)*l.in])
			}
		}
		// in is the previous layer's activation: its derivative in terms of
		// the activation value.
		if n.act == ReLU {
			for i, a := range in {
				if a <= 0 {
					prev[i] = 0
				}
			}
		} else {
			for i, a := range in {
				prev[i] *= 1 - a*a
			}
		}
	}
	return ce
}

// adam is the Adam optimiser with the usual constants.
type adam struct {
	m, v   []float64
	b1, b2 float64
	b1t    float64 // b1^t
	b2t    float64
}

func newAdam(n int) *adam {
	return &adam{m: make([]float64, n), v: make([]float64, n), b1: 0.9, b2: 0.999, b1t: 1, b2t: 1}
}

func (a *adam) step(p, g []float64, lr float64) {
	const eps = 1e-8
	a.b1t *= a.b1
	a.b2t *= a.b2
	c1, c2 := 1-a.b1t, 1-a.b2t
	for i, gi := range g {
		a.m[i] = a.b1*a.m[i] + (1-a.b1)*gi
		a.v[i] = a.b2*a.v[i] + (1-a.b2)*gi*gi
		p[i] -= lr * (a.m[i] / c1) / (math.Sqrt(a.v[i]/c2) + eps)
	}
}
