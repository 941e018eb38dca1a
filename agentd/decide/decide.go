// Package decide is the rollout search: Monte Carlo Q-factors with common
// random numbers, over all joint controls at once or one robot at a time.
//
// The Q-factor of a joint control u at state x is estimated as
//
//	Q(x,u) = mean over samples of  g(x,u,w0) + sum_{t=1..H} a^t g(x_t, base(x_t), w_t) [+ a^(H+1) Jterm(x_(H+1))]
//
// Every candidate sees the same disturbances: sample s, step t draws from a
// stream reseeded with Mix(seed, s, t), so differences between candidates
// are the controls', not luck. Results do not depend on the number of
// workers: each (candidate, sample) sum lands in its own slot and slots are
// reduced in a fixed order.
package decide

import (
	"errors"
	"fmt"
	"math"
	"runtime"

	"baton/sim/model"
)

// Config sets the Monte Carlo effort. DefaultConfig gives the documented
// defaults and Validate the documented bounds; New clamps values outside
// them only so it can never divide by zero or allocate without bound.
type Config struct {
	// Samples per Q-factor: 1..MaxSamples.
	Samples int
	// Horizon is the number of base-policy steps simulated after the first
	// step: 0..MaxHorizon (0: the first step only).
	Horizon int
	// TerminalCost adds the model's cost-to-go estimate where a simulation
	// is truncated (models implementing model.TerminalCoster).
	TerminalCost bool
	// Workers is the number of goroutines (0: GOMAXPROCS).
	Workers int
	// MaxJoint caps all-at-once searches (0: 100000 joint controls).
	MaxJoint int
}

func (c Config) withDefaults() Config {
	c.Samples = min(max(c.Samples, 1), MaxSamples)
	c.Horizon = min(max(c.Horizon, 0), MaxHorizon)
	if c.Workers <= 0 {
		c.Workers = runtime.GOMAXPROCS(0)
	}
	if c.MaxJoint <= 0 {
		c.MaxJoint = 100000
	}
	return c
}

// Stats counts the work of one decision.
type Stats struct {
	QFactors  int   // Q-factors estimated
	Shared    int   // of them, given by a control acting alike (model.Aliaser), not simulated
	Simulated int64 // simulated steps (each advances all robots)
}

func (s *Stats) add(o Stats) {
	s.QFactors += o.QFactors
	s.Shared += o.Shared
	s.Simulated += o.Simulated
}

// Estimate is one Q-factor with its standard error over samples.
type Estimate struct {
	Mean, StdErr float64
}

// ErrTooManyJoint is returned when all-at-once would exceed MaxJoint.
var ErrTooManyJoint = errors.New("too many joint controls for all-at-once rollout")

// Decider holds the scratch space of one search; it is not safe for
// concurrent use (make one per goroutine), but it uses Workers goroutines
// itself.
type Decider struct {
	m       model.Model
	cfg     Config
	term    model.TerminalCoster
	workers []*worker
	sums    []float64 // per (candidate, sample)
	cands   [][]int   // reusable joint-control buffers
	est     []Estimate
	joint   []int
	pool    *pool            // the workers besides the caller, when there are any
	jb      model.JointBaser // m's, asserted once rather than every step
	al      model.Aliaser
	slot    []int      // Turn: the candidate standing for each control
	full    []Estimate // Turn: per control, when some share a candidate
	seeds   []uint64   // Mix(seed, sample, t) at [sample*stride+t]
	stride  int
}

// worker is one goroutine's scratch, a cache line of padding on each side
// (workers write their own all the time: they must not share a line).
type worker struct {
	_   [64]byte
	s   model.State
	u   []int
	rng *model.RNG
	sim int64
	_   [64]byte
}

// New makes a Decider for m.
func New(m model.Model, cfg Config) *Decider {
	cfg = cfg.withDefaults()
	d := &Decider{m: m, cfg: cfg, joint: make([]int, m.Robots())}
	if cfg.TerminalCost {
		d.term, _ = m.(model.TerminalCoster)
	}
	d.jb, _ = m.(model.JointBaser)
	if cfg.Workers > 1 {
		d.pool = newPool(cfg.Workers - 1)
		// The pool's goroutines hold the pool, not the Decider: once the
		// Decider is unreachable they are told to stop.
		runtime.AddCleanup(d, func(p *pool) { p.stop() }, d.pool)
	}
	d.al, _ = m.(model.Aliaser)
	for range cfg.Workers {
		r := m.Robots()
		d.workers = append(d.workers, &worker{s: m.NewState(), u: make([]int, r+16)[8 : 8+r : 8+r], rng: model.NewRNG(0)})
	}
	return d
}

// Config is the effective configuration (defaults filled in).
func (d *Decider) Config() Config { return d.cfg }

// simulate runs one sample of the Q-factor of joint control u from x.
func (d *Decider) simulate(w *worker, x model.State, u []int, seed uint64, sample int) float64 {
	m := d.m
	m.CopyState(w.s, x)
	seeds := d.seeds[sample*d.stride : (sample+1)*d.stride]
	w.rng.Reseed(d.seedAt(seeds, seed, sample, 0))
	cost := m.Step(w.s, u, w.rng.Rand)
	steps := int64(1)
	defer func() { w.sim += steps }()
	a := m.Discount()
	disc := 1.0
	for t := 1; t <= d.cfg.Horizon; t++ {
		if m.Terminal(w.s) {
			return cost
		}
		disc *= a
		d.baseJoint(w.s, w.u)
		w.rng.Reseed(d.seedAt(seeds, seed, sample, t))
		cost += disc * m.Step(w.s, w.u, w.rng.Rand)
		steps++
	}
	if d.term != nil && !m.Terminal(w.s) {
		cost += disc * a * d.term.TerminalCost(w.s)
	}
	return cost
}

// seedTable bounds the per-decision table of step seeds (512 kB); past it
// seeds are mixed where they are used.
const seedTable = 1 << 16

// seedAt is Mix(seed, sample, t), from the decision's table when it has one:
// every candidate draws the same disturbances, so their seeds are mixed once
// per decision rather than once per candidate.
func (d *Decider) seedAt(seeds []uint64, seed uint64, sample, t int) uint64 {
	if len(seeds) > 0 {
		return seeds[t]
	}
	return model.Mix(seed, uint64(sample), uint64(t))
}

// fillSeeds tables Mix(seed, s, t) for every sample and step, or leaves the
// table empty when it would pass seedTable.
func (d *Decider) fillSeeds(seed uint64) {
	S, H := d.cfg.Samples, d.cfg.Horizon
	if S*(H+1) > seedTable {
		d.seeds, d.stride = d.seeds[:0], 0
		return
	}
	d.stride = H + 1
	if cap(d.seeds) < S*(H+1) {
		d.seeds = make([]uint64, S*(H+1))
	}
	d.seeds = d.seeds[:S*(H+1)]
	for s := range S {
		for t := 0; t <= H; t++ {
			d.seeds[s*(H+1)+t] = model.Mix(seed, uint64(s), uint64(t))
		}
	}
}

// baseJoint is model.BaseJoint without its per-call interface assertion.
func (d *Decider) baseJoint(s model.State, u []int) {
	if d.jb != nil {
		d.jb.BaseAll(s, u)
		return
	}
	for r := range u {
		u[r] = d.m.Base(s, r)
	}
}

// evaluate fills d.est for the joint controls in cands.
func (d *Decider) evaluate(x model.State, cands [][]int, seed uint64) Stats {
	n, S := len(cands), d.cfg.Samples
	d.fillSeeds(seed)
	tasks := n * S
	if cap(d.sums) < tasks {
		d.sums = make([]float64, tasks)
	}
	d.sums = d.sums[:tasks]
	for _, w := range d.workers {
		w.sim = 0
	}
	if len(d.workers) == 1 || tasks < 2 {
		w := d.workers[0]
		for i := range tasks {
			d.sums[i] = d.simulate(w, x, cands[i/S], seed, i%S)
		}
	} else {
		d.pool.do(tasks, func(w, i int) {
			d.sums[i] = d.simulate(d.workers[w], x, cands[i/S], seed, i%S)
		})
	}
	if cap(d.est) < n {
		d.est = make([]Estimate, n)
	}
	d.est = d.est[:n]
	for c := range n {
		d.est[c] = meanSE(d.sums[c*S : (c+1)*S])
	}
	st := Stats{QFactors: n}
	for _, w := range d.workers {
		st.Simulated += w.sim
	}
	return st
}

func meanSE(xs []float64) Estimate {
	mean := 0.0
	for _, v := range xs {
		mean += v
	}
	mean /= float64(len(xs))
	if len(xs) < 2 {
		return Estimate{Mean: mean}
	}
	ss := 0.0
	for _, v := range xs {
		ss += (v - mean) * (v - mean)
	}
	return Estimate{Mean: mean, StdErr: math.Sqrt(ss / float64(len(xs)-1) / float64(len(xs)))}
}

// QFactors estimates Q(x,u) for each joint control in cands with the given
// seed. The returned slice is reused by the next call.
func (d *Decider) QFactors(x model.State, cands [][]int, seed uint64) ([]Estimate, Stats) {
	st := d.evaluate(x, cands, seed)
	return d.est, st
}

// Turn is one robot's part of one-at-a-time rollout: robot r minimises the
// Q-factor over its own control, with every robot j != r at known[j] when
// known[j] >= 0 (its predecessors' decisions) and at its base control in x
// otherwise. Ties go to r's base control, then to the lower control.
func (d *Decider) Turn(x model.State, r int, known []int, seed uint64) (int, Stats) {
	m := d.m
	n := m.NumControls(x, r)
	// The whole base joint control at once: a fleet-wide base policy
	// (an assignment, an auction) then solves once per turn.
	d.baseJoint(x, d.joint)
	for j := range d.joint {
		if j != r && known[j] >= 0 {
			d.joint[j] = known[j]
		}
	}
	base := d.joint[r]
	// Controls that act alike (model.Aliaser) share one simulation; slot[c]
	// is the candidate that stands for control c.
	if cap(d.slot) < n {
		d.slot = make([]int, n)
	}
	slot := d.slot[:n]
	d.cands = d.cands[:0]
	k := 0
	for c := range n {
		if d.al != nil {
			if a := d.al.Alias(x, r, c); a != c {
				slot[c] = slot[a]
				continue
			}
		}
		u := d.candidate(k)
		copy(u, d.joint)
		u[r] = c
		slot[c] = k
		k++
	}
	d.cands = d.cands[:k]
	st := d.evaluate(x, d.cands, seed)
	if k < n {
		st.QFactors, st.Shared = n, n-k
		if cap(d.full) < n {
			d.full = make([]Estimate, n)
		}
		full := d.full[:n]
		for c := range n {
			full[c] = d.est[slot[c]]
		}
		return argmin(full, base), st
	}
	return argmin(d.est, base), st
}

// candidate returns the reusable buffer for candidate c.
func (d *Decider) candidate(c int) []int {
	for len(d.cands) <= c {
		if len(d.cands) < cap(d.cands) {
			d.cands = d.cands[:len(d.cands)+1]
			if d.cands[len(d.cands)-1] == nil {
				d.cands[len(d.cands)-1] = make([]int, d.m.Robots())
			}
		} else {
			d.cands = append(d.cands, make([]int, d.m.Robots()))
		}
	}
	return d.cands[c]
}

func argmin(est []Estimate, prefer int) int {
	best := prefer
	for c, e := range est {
		if e.Mean < est[best].Mean {
			best = c
		}
	}
	return best
}

// TurnSeed is the seed robot r uses in a round: the same on every machine.
func TurnSeed(fleetSeed uint64, round, r int) uint64 {
	return model.Mix(fleetSeed, uint64(round), uint64(r)+1)
}

// JointSeed is the seed of an all-at-once decision in a round.
func JointSeed(fleetSeed uint64, round int) uint64 {
	return model.Mix(fleetSeed, uint64(round), 0)
}

// OneAtATime decides the joint control for x into out: robots take turns
// in order, each knowing the choices already made. order nil means 0..m-1.
func (d *Decider) OneAtATime(x model.State, order []int, fleetSeed uint64, round int, out []int) Stats {
	for i := range out {
		out[i] = -1
	}
	var st Stats
	for k := range d.m.Robots() {
		r := k
		if order != nil {
			r = order[k]
		}
		c, s := d.Turn(x, r, out, TurnSeed(fleetSeed, round, r))
		out[r] = c
		st.add(s)
	}
	return st
}

// JointCount is the number of joint controls at x, or -1 past limit.
func JointCount(m model.Model, x model.State, limit int) int {
	n := 1
	for r := range m.Robots() {
		n *= m.NumControls(x, r)
		if n > limit {
			return -1
		}
	}
	return n
}

// AllAtOnce searches all joint controls at x. Ties go to the base joint
// control, then to the lowest joint index (robot 0 most significant).
func (d *Decider) AllAtOnce(x model.State, fleetSeed uint64, round int, out []int) (Stats, error) {
	m := d.m
	n := JointCount(m, x, d.cfg.MaxJoint)
	if n < 0 {
		return Stats{}, fmt.Errorf("%w: more than %d at this state", ErrTooManyJoint, d.cfg.MaxJoint)
	}
	model.BaseJoint(m, x, out)
	base := 0
	d.cands = d.cands[:0]
	for i := range n {
		u := d.candidate(i)
		rest := i
		for r := m.Robots() - 1; r >= 0; r-- {
			k := m.NumControls(x, r)
			u[r] = rest % k
			rest /= k
		}
		if equal(u, out) {
			base = i
		}
	}
	d.cands = d.cands[:n]
	st := d.evaluate(x, d.cands, JointSeed(fleetSeed, round))
	copy(out, d.cands[argmin(d.est, base)])
	return st, nil
}

func equal(a, b []int) bool {
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
}

// Reusing keeps one Decider for turns of varying effort, rebuilding it only
// when the effort changes (a fleet's stays the same round after round). Not
// safe for concurrent use.
type Reusing struct {
	M   model.Model
	d   *Decider
	cfg Config
}

// Turn is Decider.Turn with the Decider for cfg.
func (r *Reusing) Turn(x model.State, robot int, known []int, seed uint64, cfg Config) (int, Stats) {
	if r.d == nil || cfg != r.cfg {
		r.d, r.cfg = New(r.M, cfg), cfg
	}
	return r.d.Turn(x, robot, known, seed)
}
