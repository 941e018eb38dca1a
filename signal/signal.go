// Package signal provides guesses: stand-ins for predecessors' decisions
// that did not arrive in time.
//
// Every guess source fills the same gap behind one interface: given what a
// robot knows when its turn comes (the state, the round, the order, the
// decisions it heard), write a control for each predecessor it did not hear.
// The sources differ in what the stand-in costs and how much coordination
// it keeps:
//
//   - base: the base policy's control (cheap; herds co-located robots)
//   - last: the predecessor's control in the previous round
//   - recompute: the predecessor's own rollout turn, recomputed here (exact
//     when state and seeds are shared, at up to i times the compute)
//   - learned: a trained imitation of the rollout policy
//
// Nothing here reads a clock: a time budget arrives as Context.Expired,
// which the daemon backs with the wall clock and tests with a stub.
package signal

import (
	"fmt"
	"strings"

	"baton/agentd/decide"
	"baton/sim/model"
)

// Context is what a robot knows when it must guess.
type Context struct {
	X     model.State
	Round uint64
	Order []int  // this round's turn order (robot ids)
	Robot int    // the robot that is deciding
	Known []int  // per robot id: heard control, or -1
	Last  []int  // per robot id: its control in the previous round (from RoundClose), or -1; nil: none known
	Seed  uint64 // fleet seed: decide.TurnSeed(Seed, Round, r) is robot r's seed
	// Decide is the fleet's Monte Carlo configuration: recompute must use
	// exactly the effort the predecessor used to reproduce its choice.
	Decide decide.Config
	// Expired reports that recompute's time budget is spent; nil means
	// unlimited.
	Expired func() bool
}

// Source fills in guesses for missing predecessors.
type Source interface {
	Name() string
	// Fill writes a guess into out[j] for every j in missing (predecessors
	// of c.Robot in turn order, listed in that order); out starts as a copy
	// of c.Known. It must not change other entries of out, nor anything
	// c refers to.
	Fill(c *Context, missing []int, out []int)
}

// Classifier predicts robot r's rollout control in state x when r takes
// turn k. It is all learned needs of a trained model, so this package does
// not depend on how one is trained or stored.
type Classifier interface {
	Predict(x model.State, r, k int) int
}

// InOrder is a Classifier that can also use what robot r's predecessors
// chose (prior[j], -1 where not known), as rollout's turn r does.
type InOrder interface {
	PredictGiven(x model.State, r, k int, prior []int) int
}

// Confident is an InOrder classifier that also says how sure it is (the
// probability it gives its guess).
type Confident interface {
	PredictConfident(x model.State, r, k int, prior []int) (int, float64)
}

// Options configure New.
type Options struct {
	// Classifier backs learned (and recompute's default fallback); nil
	// when no model is loaded.
	Classifier Classifier
	// Fallback fills recompute's remaining predecessors once the budget is
	// spent; nil: learned when a Classifier is set, else base.
	Fallback Source
	// Confidence is checked's threshold: a learned guess less sure than
	// this is recomputed (0: DefaultConfidence).
	Confidence float64
	// MaxRecompute caps the predecessors recompute recomputes per Fill,
	// a budget in compute rather than time (0: no cap).
	MaxRecompute int
}

// Names lists the guess sources this build knows, cheapest first.
func Names() []string { return []string{"base", "last", "recompute", "learned", "checked"} }

// New returns the named guess source for m ("" means base).
func New(name string, m model.Model, opts Options) (Source, error) {
	switch name {
	case "base", "":
		return Base{M: m}, nil
	case "last":
		return Last{M: m}, nil
	case "learned":
		return Learned{M: m, C: opts.Classifier}, nil
	case "recompute":
		fb := opts.Fallback
		if fb == nil {
			fb = defaultFallback(m, opts.Classifier)
		}
		return NewRecompute(m, fb, opts.MaxRecompute), nil
	case "checked":
		return NewChecked(m, opts.Classifier, opts.Confidence, opts.MaxRecompute), nil
	}
	return nil, fmt.Errorf("unknown guess source %q (known: %s)", name, strings.Join(Names(), ", "))
}

func defaultFallback(m model.Model, c Classifier) Source {
	if c != nil {
		return Learned{M: m, C: c}
	}
	return Base{M: m}
}

// valid reports whether c is a control of robot r in x.
func valid(m model.Model, x model.State, r, c int) bool {
	return c >= 0 && c < m.NumControls(x, r)
}

// position is r's index in order, or -1.
func position(order []int, r int) int {
	for k, o := range order {
		if o == r {
			return k
		}
	}
	return -1
}

// Base guesses the base policy's control: cheap, and what the robot
// assumes of its successors anyway.
type Base struct{ M model.Model }

func (Base) Name() string { return "base" }

func (b Base) Fill(c *Context, missing []int, out []int) {
	for _, j := range missing {
		out[j] = b.M.Base(c.X, j)
	}
}

// Last guesses that a predecessor repeats its previous round's control.
// Controls are indices into a robot's current options, so a control that
// is no longer valid in this round's state (upkeep: the robot moved to a
// site with fewer roads) is adapted to the base control, and so is a robot
// with no previous control (first round, held, or a round not seen).
type Last struct{ M model.Model }

func (Last) Name() string { return "last" }

func (l Last) Fill(c *Context, missing []int, out []int) {
	for _, j := range missing {
		if j < len(c.Last) && valid(l.M, c.X, j, c.Last[j]) {
			out[j] = c.Last[j]
		} else {
			out[j] = l.M.Base(c.X, j)
		}
	}
}

// Learned guesses with a classifier imitating the rollout policy. With no
// classifier, or a prediction that is not a valid control, it guesses base.
type Learned struct {
	M model.Model
	C Classifier
}

func (Learned) Name() string { return "learned" }

// Loaded reports whether a classifier is set (otherwise guesses are base).
func (l Learned) Loaded() bool { return l.C != nil }

// Fill guesses in turn order: each missing predecessor's guess is made
// knowing the controls of the robots before it, heard or guessed just
// before (with an InOrder classifier), so robots in one place are told
// apart as rollout tells them apart.
func (l Learned) Fill(c *Context, missing []int, out []int) {
	inOrder, _ := l.C.(InOrder)
	var buf [model.MaxRobots]int
	for _, j := range missing {
		k := position(c.Order, j)
		if l.C != nil && k >= 0 {
			u := -1
			if inOrder != nil {
				u = inOrder.PredictGiven(c.X, j, k, before(c.Order, k, out, buf[:]))
			} else {
				u = l.C.Predict(c.X, j, k)
			}
			if valid(l.M, c.X, j, u) {
				out[j] = u
				continue
			}
		}
		out[j] = l.M.Base(c.X, j)
	}
}

// Recompute recomputes each missing predecessor's one-at-a-time rollout
// turn: predecessor j decided knowing every robot before it in the order
// (heard here, or recomputed just before) with the robots after it at base,
// using its own seed, so with the same state, seeds and Decide the guess is
// j's real decision. A robot at turn i pays up to i extra turns of compute;
// once Context.Expired reports true (checked before each predecessor) or
// MaxRecompute is reached, the remaining predecessors go to the fallback.
//
// It keeps one Decider (rebuilt only when Context.Decide changes) so a turn
// allocates nothing; it is therefore not safe for concurrent use. The
// daemon calls it from its event loop only.
type Recompute struct {
	m        model.Model
	fallback Source
	max      int

	dec   decide.Reusing
	known []int
}

// NewRecompute returns recompute for m; fallback must not be nil.
func NewRecompute(m model.Model, fallback Source, maxRecompute int) *Recompute {
	return &Recompute{m: m, fallback: fallback, max: maxRecompute, known: make([]int, m.Robots()), dec: decide.Reusing{M: m}}
}

func (*Recompute) Name() string { return "recompute" }

// Fallback is the source used once the budget is spent.
func (r *Recompute) Fallback() Source { return r.fallback }

func (r *Recompute) Fill(c *Context, missing []int, out []int) {
	for i, j := range missing {
		if (c.Expired != nil && c.Expired()) || (r.max > 0 && i >= r.max) {
			r.fallback.Fill(c, missing[i:], out)
			return
		}
		k := position(c.Order, j)
		if k < 0 {
			// Not a predecessor after all: nothing to reproduce.
			r.fallback.Fill(c, missing[i:i+1], out)
			continue
		}
		out[j] = r.turn(c, j, k, out)
	}
}

// turn is predecessor j's own rollout turn at position k, knowing what
// out holds for the robots before it.
func (r *Recompute) turn(c *Context, j, k int, out []int) int {
	u, _ := r.dec.Turn(c.X, j, before(c.Order, k, out, r.known), decide.TurnSeed(c.Seed, int(c.Round), j), c.Decide)
	return u
}

// before writes into dst (len >= robots) out's controls for the robots
// at positions 0..k-1 of order, -1 for every other robot, and returns the
// robots' part of dst: what robot order[k] knows when it decides.
func before(order []int, k int, out, dst []int) []int {
	dst = dst[:min(len(out), len(dst))]
	for i := range dst {
		dst[i] = -1
	}
	for _, p := range order[:k] {
		if p < len(dst) {
			dst[p] = out[p]
		}
	}
	return dst
}

// Sources builds, caches and names the guess sources round starts ask for,
// with a fallback for names this robot cannot make (learned without a
// classifier, or a name this build does not know). Not safe for concurrent
// use.
type Sources struct {
	m        model.Model
	opts     Options
	fallback Source
	cache    map[string]Source
}

// maxNamed bounds the cached names: names come from the bus.
const maxNamed = 16

// NewSources makes the set; fallback must be one of Names().
func NewSources(m model.Model, fallback string, opts Options) (*Sources, error) {
	fb, err := New(fallback, m, opts)
	if err != nil {
		return nil, err
	}
	return &Sources{m: m, opts: opts, fallback: fb, cache: map[string]Source{}}, nil
}

// Get is the named source; when it cannot be made, the fallback and why
// (why is "" when the named source itself is returned, and is returned
// non-empty only the first time for each name).
func (s *Sources) Get(name string) (Source, string) {
	if name == "" || name == s.fallback.Name() {
		return s.fallback, ""
	}
	if src, ok := s.cache[name]; ok {
		return src, ""
	}
	why := ""
	var src Source
	if name == "learned" && s.opts.Classifier == nil {
		why = "no classifier loaded"
	} else {
		var err error
		if src, err = New(name, s.m, s.opts); err != nil {
			why = err.Error()
		}
	}
	if why == "" {
		s.cache[name] = src
		return src, ""
	}
	if len(s.cache) < maxNamed {
		s.cache[name] = s.fallback
		return s.fallback, why
	}
	return s.fallback, ""
}

// Fallback is the source used for names that cannot be made.
func (s *Sources) Fallback() Source { return s.fallback }

// DefaultConfidence is checked's default threshold: chosen on the herding
// case (see signal/herding), where below it guesses are wrong often enough
// to be worth a turn of compute.
const DefaultConfidence = 0.8

// Paths counts how checked made its guesses.
type Paths struct {
	Confident  uint64 `json:"confident"`  // the learned guess, sure enough
	Recomputed uint64 `json:"recomputed"` // weak: the predecessor's turn recomputed
	FellBack   uint64 `json:"fell_back"`  // weak, but no time left: the learned guess anyway
}

// Checked guesses with the learned classifier, in turn order, and
// recomputes (as recompute does) only the predecessors whose guess it is
// less sure of than its threshold, while the time budget lasts; a weak
// guess out of time is used anyway. Without a classifier every guess is
// weak. Like Recompute it is not safe for concurrent use.
type Checked struct {
	m         model.Model
	learned   Learned
	conf      Confident
	threshold float64
	rec       *Recompute
	paths     Paths
}

// NewChecked returns checked for m with classifier c (nil: none loaded).
func NewChecked(m model.Model, c Classifier, threshold float64, maxRecompute int) *Checked {
	if !(threshold > 0 && threshold <= 1) {
		threshold = DefaultConfidence
	}
	ch := &Checked{m: m, learned: Learned{M: m, C: c}, threshold: threshold, rec: NewRecompute(m, Base{M: m}, maxRecompute)}
	ch.conf, _ = c.(Confident)
	return ch
}

func (*Checked) Name() string { return "checked" }

// Paths is how the guesses so far were made.
func (c *Checked) Paths() Paths { return c.paths }

func (c *Checked) Fill(ctx *Context, missing []int, out []int) {
	var buf [model.MaxRobots]int
	recomputed := 0
	for _, j := range missing {
		k := position(ctx.Order, j)
		u, sure := -1, 0.0
		if c.conf != nil && k >= 0 {
			u, sure = c.conf.PredictConfident(ctx.X, j, k, before(ctx.Order, k, out, buf[:]))
			if !valid(c.m, ctx.X, j, u) {
				u, sure = -1, 0
			}
		}
		switch {
		case u >= 0 && sure >= c.threshold:
			out[j] = u
			c.paths.Confident++
		case k >= 0 && (c.rec.max == 0 || recomputed < c.rec.max) && (ctx.Expired == nil || !ctx.Expired()):
			// Expired is asked once per turn recomputed (it books the time).
			out[j] = c.rec.turn(ctx, j, k, out)
			recomputed++
			c.paths.Recomputed++
		default:
			if u < 0 {
				out[j] = c.m.Base(ctx.X, j)
			} else {
				out[j] = u
			}
			c.paths.FellBack++
		}
	}
}
