package upkeep

import (
	"fmt"

	"baton/sim/model"
)

// RandomTiny is a random, tiny, fully observed (observe: all) discounted
// instance for exact checks: 2-4 sites on a random connected graph, levels
// 1-2, 1-2 robots on random start sites, random birth or upward-jump chains,
// increasing level costs, discount in [0.8,0.95]. Positions times level
// vectors bound the reachable states by n^m (L+1)^n <= 4^2 * 3^4 = 1296.
// The same seed always gives the same instance.
func RandomTiny(seed uint64) *Model {
	rng := model.NewRNG(model.Mix(seed, 0x75706b656570)) // "upkeep"
	n := 2 + rng.IntN(3)
	L := 1 + rng.IntN(2)
	k := L + 1
	robots := 1 + rng.IntN(2)
	sp := &spec{
		levels:      L,
		threshLevel: 1 + rng.IntN(L),
		threshProb:  0.1 + 0.5*rng.Float64(),
		discount:    0.8 + 0.15*rng.Float64(),
		horizon:     50,
		observeAll:  true,
	}
	sp.cost = make([]float64, k)
	for l := 1; l < k; l++ {
		sp.cost[l] = sp.cost[l-1] + 0.5 + 4.5*rng.Float64()
	}
	for s := range n {
		sp.names = append(sp.names, fmt.Sprintf("s%d", s))
		sp.xy = append(sp.xy, [2]float64{float64(s), 0})
		p := 0.05 + 0.45*rng.Float64()
		c := birthChain(L, p)
		if L == 2 && rng.IntN(3) == 0 {
			// A site that can fail outright: part of the up-step jumps two.
			j := p * rng.Float64()
			c[0*k+1] = p - j
			c[0*k+2] = j
		}
		sp.chains = append(sp.chains, c)
		sp.startLevel = append(sp.startLevel, rng.IntN(k))
	}
	// A random spanning tree (each new site joins an earlier one) keeps the
	// graph connected; extra edges then make it not always a tree.
	have := map[[2]int]bool{}
	for s := 1; s < n; s++ {
		a := rng.IntN(s)
		sp.roads = append(sp.roads, [2]int{a, s})
		have[[2]int{a, s}] = true
	}
	for a := range n {
		for b := a + 1; b < n; b++ {
			if !have[[2]int{a, b}] && rng.IntN(3) == 0 {
				sp.roads = append(sp.roads, [2]int{a, b})
			}
		}
	}
	for range robots {
		sp.startPos = append(sp.startPos, rng.IntN(n))
	}
	return build(sp)
}
