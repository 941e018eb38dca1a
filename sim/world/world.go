// Package world is the simulator's side of a fleet: the true state, stepped
// with the seeded disturbance stream and the joint control the fleet
// carried out, and the reports each robot's own software would make.
package world

import (
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

	seed  uint64
	rng   *model.RNG
	fresh model.State
}

// New starts a world from episode seed seed: the same start state
// episode.Run uses.
func New(m model.Fleet, seed uint64) *World {
	w := &World{M: m, Y: m.NewState(), seed: seed, rng: model.NewRNG(0), fresh: m.NewState()}
	episode.Start(m, seed, w.Y)
	return w
}

// Apply carries out joint control u as round Round+1 and returns its stage
// cost.
func (w *World) Apply(u []int) float64 {
	w.Round++
	w.rng.Reseed(episode.WorldSeed(w.seed, w.Round))
	c := w.M.Step(w.Y, u, w.rng.Rand)
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
}

// Report is what robot r's own software reports after the last round.
func (w *World) Report(r int) (pos int32, seen []model.Sighting) {
	return w.M.Position(w.Y, r), w.M.Sense(w.Y, r, nil)
}
