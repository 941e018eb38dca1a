package model

import "math/rand/v2"

// Mix folds values into one 64-bit seed (splitmix64 finaliser on each step),
// so seeds derived from (fleet seed, round, robot, sample, step) are well
// spread and reproducible on every machine.
func Mix(vals ...uint64) uint64 {
	h := uint64(0x9e3779b97f4a7c15)
	for _, v := range vals {
		h ^= v + 0x9e3779b97f4a7c15 + (h << 6) + (h >> 2)
		h = splitmix(h)
	}
	return h
}

func splitmix(z uint64) uint64 {
	z += 0x9e3779b97f4a7c15
	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9
	z = (z ^ (z >> 27)) * 0x94d049bb133111eb
	return z ^ (z >> 31)
}

// RNG is a reseedable generator: Reseed costs nothing and does not allocate,
// which is what common random numbers need (the same stream per sample and
// step, whatever candidate control is being evaluated).
type RNG struct {
	src *rand.PCG
	*rand.Rand
}

// NewRNG returns a generator seeded with seed.
func NewRNG(seed uint64) *RNG {
	// The generator's state is written on every draw: a cache line of its
	// own on both sides, so generators of different rollout workers (made
	// one after another, 16 bytes each) never share a line.
	p := &paddedPCG{}
	p.src.Seed(seed, splitmix(seed))
	return &RNG{src: &p.src, Rand: rand.New(&p.src)}
}

type paddedPCG struct {
	_   [64]byte
	src rand.PCG
	_   [64]byte
}

// Reseed restarts the stream at seed.
func (g *RNG) Reseed(seed uint64) { g.src.Seed(seed, splitmix(seed)) }
