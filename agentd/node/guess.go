package node

import (
	"context"
	"fmt"
	"slices"
	"sync"
	"sync/atomic"
	"time"

	"go.uber.org/zap"

	"baton/agentd/decide"
	"baton/agentd/turn"
	"baton/signal"
	"baton/signal/learn"
	"baton/sim/model"
)

// Computer runs one robot's rollout turn. The default is decide.Decider;
// benchmarks swap in a stub of fixed cost.
type Computer interface {
	Turn(x model.State, r int, known []int, seed uint64, p turn.Params) int
}

// Rollout is the real Computer.
type Rollout struct {
	mu sync.Mutex
	r  decide.Reusing
}

// NewRollout is the rollout for m.
func NewRollout(m model.Model) *Rollout { return &Rollout{r: decide.Reusing{M: m}} }

func (r *Rollout) Turn(x model.State, robot int, known []int, seed uint64, p turn.Params) int {
	r.mu.Lock()
	defer r.mu.Unlock()
	c, _ := r.r.Turn(x, robot, known, seed, p.Decide())
	return c
}

// guesser fills in missing predecessors with the round's guess source and
// keeps the fleet's guess model current. It is used by the node's loop
// only (the fetch runs on its own goroutine and reports back).
type guesser struct {
	n        *Node
	sources  *signal.Sources
	saidBase bool // logged that unloaded learned guesses are base

	version  atomic.Uint64 // guess model version in use (0: none from the fleet)
	fetching bool
	failed   map[uint64]time.Time // versions that failed, not fetched again for a while
}

type modelMsg struct {
	version uint64
	net     *learn.Net
	err     error
}

func newGuesser(n *Node) *guesser {
	g := &guesser{n: n, failed: map[uint64]time.Time{}}
	g.rebuild()
	return g
}

func (g *guesser) rebuild() {
	s, err := signal.NewSources(g.n.cfg.Model, g.n.cfg.Guess, g.n.cfg.Guesses)
	if err != nil { // Validate refuses unknown fallbacks
		s, _ = signal.NewSources(g.n.cfg.Model, "base", g.n.cfg.Guesses)
	}
	g.sources = s
}

// fill returns Known with every missing predecessor guessed.
func (g *guesser) fill(c turn.Compute) []int {
	known := slices.Clone(c.Known)
	n := g.n
	ctx := &signal.Context{X: c.State, Round: c.Round, Order: c.Order, Robot: n.cfg.Robot, Known: c.Known,
		Last: c.Last, Seed: c.Params.Seed, Decide: c.Params.Decide()}
	// Stop recomputing once one more recompute and this robot's own turn
	// (each about the last turn's compute) no longer fit before its
	// deadline, less the hop that delivers the decision and a margin.
	due := c.Due - n.cfg.GuessMargin - time.Duration(n.hop.Load())
	ctx.Expired = func() bool { return n.now()+2*n.turnTook >= due }
	src, why := g.sources.Get(c.GuessSource)
	if why != "" {
		n.cfg.Log.Warn("the round start names a guess source this robot cannot make; using the fallback (--guess)",
			zap.String("named", c.GuessSource), zap.String("fallback", src.Name()), zap.String("why", why))
	}
	if l, ok := src.(signal.Learned); ok && !l.Loaded() && !g.saidBase {
		g.saidBase = true
		n.cfg.Log.Warn("no classifier loaded: learned guesses are the base policy's")
	}
	src.Fill(ctx, c.Guess, known)
	return known
}

// maybeFetch starts fetching guess model v when a round start names one
// this robot does not have (one fetch at a time; a version that failed is
// retried after 30 s).
func (g *guesser) maybeFetch(v uint64) {
	n := g.n
	if v == 0 || v == g.version.Load() || g.fetching || n.cfg.FetchModel == nil {
		return
	}
	if t, bad := g.failed[v]; bad && time.Since(t) < 30*time.Second {
		return
	}
	if len(g.failed) > 64 {
		clear(g.failed) // versions come from the bus: remember a few
	}
	g.fetching = true
	go func() {
		ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
		defer cancel()
		data, err := n.cfg.FetchModel(ctx, v)
		var net *learn.Net
		if err == nil {
			var meta learn.Meta
			net, meta, err = learn.Check(data, n.cfg.Model)
			if err == nil && meta.Version != v {
				err = fmt.Errorf("the object for version %d holds version %d", v, meta.Version)
			}
		}
		select {
		case n.models <- modelMsg{version: v, net: net, err: err}:
		case <-n.done:
		}
	}()
}

// loaded swaps in a fetched model, or keeps the one in use when the new
// one is bad.
func (g *guesser) loaded(ev modelMsg) {
	n := g.n
	g.fetching = false
	if ev.err != nil {
		g.failed[ev.version] = time.Now()
		n.cfg.Log.Error("guess model refused; keeping the one in use", zap.Uint64("version", ev.version),
			zap.Uint64("in_use", g.version.Load()), zap.Error(ev.err))
		return
	}
	g.version.Store(ev.version)
	n.cfg.Guesses.Classifier = ev.net
	n.cfg.Metrics.Model.Set(float64(ev.version))
	// Sources hold the classifier: rebuild them.
	g.rebuild()
	g.saidBase = false
	n.cfg.Log.Info("guess model loaded", zap.Uint64("version", ev.version))
}

// ModelVersion is the guess model version in use (0: none from the fleet).
func (n *Node) ModelVersion() uint64 { return n.guesses.version.Load() }
