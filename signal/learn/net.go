package learn

import (
	"fmt"
	"math"
	"sync"

	"gonum.org/v1/gonum/floats"

	"baton/sim/model"
)

// Activation is the hidden layers' nonlinearity.
type Activation int

const (
	Tanh Activation = iota + 1
	ReLU
)

func (a Activation) String() string {
	switch a {
	case Tanh:
		return "tanh"
	case ReLU:
		return "relu"
	}
	return fmt.Sprintf("activation(%d)", int(a))
}

// layer is dense: out = W in + b, W row-major (out rows of in columns).
// w and b are views into Net.params, so the optimiser sees one vector.
type layer struct {
	in, out int
	w, b    []float64
}

// Meta describes a model: what it is for and how it was made.
type Meta struct {
	Scenario       string
	FeatureVersion string
	RobotsTrained  int
	Inputs         int
	Outputs        int
	Hidden         []int
	Activation     Activation
	Version        uint64 // distribution version, set by Marshal/Save
	CreatedBy      string

	Seed          uint64
	Samples       int
	Episodes      int
	Epochs        int
	Batch         int
	LearningRate  float64
	WeightDecay   float64
	FinalLoss     float64
	TrainAccuracy float64

	TestSamples      int
	TestAccuracy     float64
	TestMajorityRate float64
}

// Net is a trained classifier over control indices. Its weights never
// change after Train or Unmarshal, so Predict may be called from many
// goroutines at once. A Net must not be copied (it holds a sync.Pool).
type Net struct {
	meta   Meta
	act    Activation
	mean   []float64 // input standardisation: z = (x-mean)*scale
	scale  []float64
	params []float64
	layers []layer

	// Bound by Train, Check, Load or AsBase; Unmarshal leaves them nil.
	f Featurizer
	m model.Model

	pool sync.Pool // *scratch
}

// scratch is one caller's buffers for a forward pass.
type scratch struct {
	feat []float64
	acts [][]float64 // acts[0] standardised input, acts[i] output of layer i-1
}

// newNet lays out parameters for the given sizes (zero weights).
func newNet(inputs int, hidden []int, outputs int, act Activation) *Net {
	n := &Net{act: act}
	sizes := append(append([]int{inputs}, hidden...), outputs)
	total := 0
	for i := 1; i < len(sizes); i++ {
		total += sizes[i-1]*sizes[i] + sizes[i]
	}
	n.params = make([]float64, total)
	off := 0
	for i := 1; i < len(sizes); i++ {
		in, out := sizes[i-1], sizes[i]
		l := layer{in: in, out: out}
		l.w = n.params[off : off+in*out : off+in*out]
		off += in * out
		l.b = n.params[off : off+out : off+out]
		off += out
		n.layers = append(n.layers, l)
	}
	n.mean = make([]float64, inputs)
	n.scale = make([]float64, inputs)
	for i := range n.scale {
		n.scale[i] = 1
	}
	n.meta.Inputs, n.meta.Outputs = inputs, outputs
	n.meta.Hidden = append([]int(nil), hidden...)
	n.meta.Activation = act
	n.pool.New = func() any { return n.newScratch() }
	return n
}

func (n *Net) newScratch() *scratch {
	s := &scratch{feat: make([]float64, n.Inputs())}
	s.acts = append(s.acts, make([]float64, n.Inputs()))
	for _, l := range n.layers {
		s.acts = append(s.acts, make([]float64, l.out))
	}
	return s
}

// bind attaches the featurizer (and through it the model for masking).
func (n *Net) bind(f Featurizer) {
	n.f = f
	n.m = nil
	if mo, ok := f.(modelOf); ok {
		n.m = mo.model()
	}
}

// Inputs is the feature vector length the net takes.
func (n *Net) Inputs() int { return n.meta.Inputs }

// Outputs is the number of control indices it scores (MaxControls).
func (n *Net) Outputs() int { return n.meta.Outputs }

// Meta returns the model's description (a copy).
func (n *Net) Meta() Meta {
	m := n.meta
	m.Hidden = append([]int(nil), n.meta.Hidden...)
	return m
}

// forward computes the logits for raw features x into s and returns them.
func (n *Net) forward(x []float64, s *scratch) []float64 {
	z := s.acts[0]
	for i, v := range x {
		z[i] = (v - n.mean[i]) * n.scale[i]
	}
	for li, l := range n.layers {
		in, out := s.acts[li], s.acts[li+1]
		for o := range l.out {
			out[o] = l.b[o] + floats.Dot(l.w[o*l.in:(o+1)*l.in], in)
		}
		if li < len(n.layers)-1 {
			activate(n.act, out)
		}
	}
	return s.acts[len(n.layers)]
}

func activate(a Activation, v []float64) {
	if a == ReLU {
		for i, x := range v {
			if x < 0 {
				v[i] = 0
			}
		}
		return
	}
	for i, x := range v {
		v[i] = math.Tanh(x)
	}
}

// argmaxValid is the highest logit among controls 0..valid-1 (ties: the
// lower index). The argmax of the logits is that of the softmax.
func argmaxValid(logits []float64, valid int) int {
	best := 0
	for c := 1; c < valid && c < len(logits); c++ {
		if logits[c] > logits[best] {
			best = c
		}
	}
	return best
}

// Predict guesses the control robot r chooses at position k of the turn
// order in x: the most likely valid control. It allocates nothing in
// steady state and is safe for concurrent use. It panics on a net not bound
// to a model (one from Unmarshal: use Check or Load).
func (n *Net) Predict(x model.State, r, k int) int { return n.PredictGiven(x, r, k, nil) }

// PredictGiven is Predict knowing some predecessors' controls (prior[j],
// -1 where not known; see Featurizer).
func (n *Net) PredictGiven(x model.State, r, k int, prior []int) int {
	c, _ := n.PredictConfident(x, r, k, prior)
	return c
}

// PredictConfident is PredictGiven with the net's confidence in its guess:
// the softmax probability of the chosen control among the valid ones.
func (n *Net) PredictConfident(x model.State, r, k int, prior []int) (int, float64) {
	if n.f == nil {
		panic("learn: Predict on a net not bound to a model (use Check or Load, not Unmarshal)")
	}
	s := n.pool.Get().(*scratch)
	n.f.Features(x, r, k, prior, s.feat)
	logits := n.forward(s.feat, s)
	valid := n.Outputs()
	if n.m != nil {
		valid = min(valid, n.m.NumControls(x, r))
	}
	c := argmaxValid(logits, valid)
	sum := 0.0
	for i := range min(valid, len(logits)) {
		sum += math.Exp(logits[i] - logits[c])
	}
	n.pool.Put(s)
	return c, 1 / sum
}

// Accuracy is the share of d's samples whose recorded control the net
// predicts (argmax over the sample's valid controls); 0 for an empty set.
func (n *Net) Accuracy(d *Dataset) float64 {
	if d == nil || d.Len() == 0 {
		return 0
	}
	if d.inputs != n.Inputs() || d.classes != n.Outputs() {
		panic(fmt.Sprintf("learn: dataset is %d->%d, net is %d->%d", d.inputs, d.classes, n.Inputs(), n.Outputs()))
	}
	s := n.newScratch()
	hit := 0
	for i := range d.Len() {
		logits := n.forward(d.row(i), s)
		if argmaxMasked(logits, d.mask(i)) == d.y[i] {
			hit++
		}
	}
	return float64(hit) / float64(d.Len())
}

// GuessInOrder is what robot k of a parallel fleet (turn order 0..m-1)
// assumes of its predecessors: known[j] for j < k is the net's guess for
// robot j, made knowing the guesses before it (base where the guess is not
// a control of j); every other entry is -1.
func (n *Net) GuessInOrder(m model.Model, x model.State, k int, known []int) {
	for j := range known {
		known[j] = -1
	}
	for j := range k {
		// known holds exactly robots 0..j-1's guesses here.
		if u := n.PredictGiven(x, j, j, known); u >= 0 && u < m.NumControls(x, j) {
			known[j] = u
		} else {
			known[j] = m.Base(x, j)
		}
	}
}

// AccuracyByPosition is Accuracy per position in the turn order (index
// k), for the positions d has samples of.
func (n *Net) AccuracyByPosition(d *Dataset) []float64 {
	if d == nil || d.Len() == 0 {
		return nil
	}
	s := n.newScratch()
	var hit, all []int
	for i := range d.Len() {
		k := d.pos[i]
		for len(all) <= k {
			hit, all = append(hit, 0), append(all, 0)
		}
		all[k]++
		if argmaxMasked(n.forward(d.row(i), s), d.mask(i)) == d.y[i] {
			hit[k]++
		}
	}
	out := make([]float64, len(all))
	for k := range all {
		if all[k] > 0 {
			out[k] = float64(hit[k]) / float64(all[k])
		}
	}
	return out
}

func argmaxMasked(logits []float64, mask []bool) int {
	best := -1
	for c, ok := range mask {
		if ok && (best < 0 || logits[c] > logits[best]) {
			best = c
		}
	}
	return best
}

// NoteHeldOut measures the net on a held-out set and records the figures
// (samples, accuracy, the set's majority-class rate) in its metadata, so the
// model file carries them. Call it before sharing the net.
func (n *Net) NoteHeldOut(test *Dataset) float64 {
	acc := n.Accuracy(test)
	n.meta.TestSamples = test.Len()
	n.meta.TestAccuracy = acc
	n.meta.TestMajorityRate = test.MajorityRate()
	return acc
}
