package model

import "math/rand/v2"

// Truther is implemented by belief-state scenarios whose simulator can also
// keep the hidden truth the belief is about (upkeep: each site's true wear
// level): the world then draws the truth, charges its true stage cost, and
// robots report what they see of it. The fleet still decides on the belief.
type Truther interface {
	// DrawTruth draws hidden values consistent with belief s.
	DrawTruth(s State, rng *rand.Rand) []int32
	// TrueStep carries out joint control u on truth (robots at their
	// positions in s, before s moves) and returns the true stage cost,
	// then lets the truth evolve one step; it draws a fixed number of
	// values from rng whatever u is.
	TrueStep(truth []int32, s State, u []int, rng *rand.Rand) float64
	// TrueSense is what robot r sees of the truth from its position in s.
	TrueSense(truth []int32, s State, r int, dst []Sighting) []Sighting
}

// StageKind says what m's stage cost is: that of the simulated state, or,
// for a belief-state scenario (one whose world can keep a hidden truth),
// the expectation over the belief.
func StageKind(m Model) string {
	if _, belief := m.(Truther); belief {
		return "each stage cost the expectation over the belief of the hidden state"
	}
	return "each stage cost that of the simulated state"
}
