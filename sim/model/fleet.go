package model

// Sighting is one thing a robot perceives: What names it (a slick index, a
// site index), Value is what was seen (a cell, a wear level).
type Sighting struct {
	What  int32 `json:"what"`
	Value int32 `json:"value"`
}

// Fleet is implemented by scenarios that run as a distributed fleet: the
// coordinator builds the decision state from what robots report instead of
// owning the world.
//
// The round trip that must hold bit for bit (and is tested per scenario):
// take a decision state x, a joint control u and an rng; let y be x after
// Step(y, u, rng). Then starting from a copy z of x, Advance(z, u) followed
// by Absorb(z, r, Position(y, r), Sense(y, r)) for every robot r yields a
// state equal to y (same Flatten output). That is what makes a distributed
// fleet decide exactly as the in-process rollout does.
type Fleet interface {
	Model
	// Position is robot r's cell or site in s.
	Position(s State, r int) int32
	// Sense is what robot r perceives in s after a step (appended to dst).
	Sense(s State, r int, dst []Sighting) []Sighting
	// Advance predicts the decision state after joint control u was carried
	// out, before any observation (moves, collection or service, and for
	// beliefs the wear propagation), and returns the stage cost (expected,
	// for beliefs) that Step would have returned.
	Advance(x State, u []int) float64
	// Absorb merges robot r's report into x. A report that cannot be right
	// (position off the map, unknown slick or site, impossible value) is an
	// error and leaves x unchanged.
	Absorb(x State, r int, pos int32, seen []Sighting) error
	// Flatten appends s to ints and reals for the wire.
	Flatten(s State, ints []int32, reals []float64) ([]int32, []float64)
	// Unflatten is the inverse; it validates lengths and ranges.
	Unflatten(dst State, ints []int32, reals []float64) error
}
