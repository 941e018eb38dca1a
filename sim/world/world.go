// Package world is the simulator's side of a fleet: the true state, stepped
// with the seeded disturbance stream and the joint control the fleet
// carried out, and the reports each robot's own software would make.
package world

import (
	"fmt"

	"baton/sim/episode"
	"baton/sim/model"
)

// World is one seeded run. When a scenario reaches a terminal state (every
// slick collected) a fresh batch is drawn and the robots stay where they
// are, so a fleet can run any number of rounds.
type World struct {
	M     model.Fleet
	Y     model.State
	Round int     // rounds applied so far
	Cost  float64 // sum of stage costs (undiscounted)
	Batch int     // batches finished

	// TrueCost sums the true stage costs of a world that keeps the hidden
	// truth (NewTrue; 0 otherwise).
	TrueCost float64

	seed  uint64
	rng   *model.RNG
	fresh model.State
	truth []int32       // the hidden truth (NewTrue), nil otherwise
	tr    model.Truther // M as a Truther, with truth
	seen  []model.Sighting
}

// New starts a world from episode seed seed: the same start state
// episode.Run uses.
func New(m model.Fleet, seed uint64) *World {
	w := &World{M: m, Y: m.NewState(), seed: seed, rng: model.NewRNG(0), fresh: m.NewState()}
	episode.Start(m, seed, w.Y)
	return w
}

// NewTrue is New for a belief-state scenario whose world also keeps the
// hidden truth (model.Truther): the truth is drawn from the start belief,
// each round charges its true stage cost as well (TrueCost), and robots
// report what they see of the truth, which the belief then absorbs. The
// fleet still decides on the belief; the draws differ from New's, so its
// episodes are not sim compare's.
func NewTrue(m model.Fleet, seed uint64) (*World, error) {
	tr, ok := m.(model.Truther)
	if !ok {
		return nil, fmt.Errorf("scenario %s keeps no hidden truth (its state is the truth)", m.Name())
	}
	w := New(m, seed)
	w.tr = tr
	w.truth = tr.DrawTruth(w.Y, model.NewRNG(model.Mix(seed, 7)).Rand)
	return w, nil
}

// Apply carries out joint control u as round Round+1 and returns its stage
// cost.
func (w *World) Apply(u []int) float64 {
	w.Round++
	w.rng.Reseed(episode.WorldSeed(w.seed, w.Round))
	var c float64
	if w.tr == nil {
		c = w.M.Step(w.Y, u, w.rng.Rand)
	} else {
		w.TrueCost += w.tr.TrueStep(w.truth, w.Y, u, w.rng.Rand)
		c = w.M.Advance(w.Y, u)
		for r := range w.M.Robots() {
			w.seen = w.tr.TrueSense(w.truth, w.Y, r, w.seen[:0])
			_ = w.M.Absorb(w.Y, r, w.M.Position(w.Y, r), w.seen) // the truth is always a valid report
		}
	}
	w.Cost += c
	if w.M.Terminal(w.Y) {
		w.renew()
	}
	return c
}

func (w *World) renew() {
	w.Batch++
	w.M.Start(w.fresh, model.NewRNG(model.Mix(w.seed, 3, uint64(w.Batch))).Rand)
	for r := range w.M.Robots() {
		// Robots stay put: their positions carry over into the new batch.
		_ = w.M.Absorb(w.fresh, r, w.M.Position(w.Y, r), nil)
	}
	w.M.CopyState(w.Y, w.fresh)
	if w.tr != nil {
		w.truth = w.tr.DrawTruth(w.Y, model.NewRNG(model.Mix(w.seed, 7, uint64(w.Batch))).Rand)
	}
}

// Report is what robot r's own software reports after the last round.
func (w *World) Report(r int) (pos int32, seen []model.Sighting) {
	if w.tr != nil {
		return w.M.Position(w.Y, r), w.tr.TrueSense(w.truth, w.Y, r, nil)
	}
	return w.M.Position(w.Y, r), w.M.Sense(w.Y, r, nil)
}
