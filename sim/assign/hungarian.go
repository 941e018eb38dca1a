// Package assign is the assignment baseline a practitioner would pick
// instead of rollout: each step, robots are assigned to targets by an
// optimal assignment (the Hungarian method: Kuhn 1955, Munkres 1957) of
// their travel distances, and each moves one step along a shortest path
// to its target.
package assign

import "math"

// Solve finds an assignment of rows to columns of the n x m cost matrix
// with the least total cost: to[i] is row i's column, or -1 when there are
// more rows than columns and row i gets none. It is the O(k^3) shortest
// augmenting path form of the Hungarian method with potentials (k =
// max(n, m)), on the matrix padded square with zeros.
func Solve(cost [][]float64) (to []int, total float64) {
	n := len(cost)
	if n == 0 {
		return nil, 0
	}
	m := len(cost[0])
	k := max(n, m)
	c := func(i, j int) float64 { // 1-based, padded
		if i > n || j > m {
			return 0
		}
		return cost[i-1][j-1]
	}
	u := make([]float64, k+1)
	v := make([]float64, k+1)
	p := make([]int, k+1) // p[j]: the row column j is assigned to (0: none)
	way := make([]int, k+1)
	minv := make([]float64, k+1)
	used := make([]bool, k+1)
	for i := 1; i <= k; i++ {
		p[0] = i
		j0 := 0
		for j := range minv {
			minv[j], used[j] = math.Inf(1), false
		}
		for {
			used[j0] = true
			i0, delta, j1 := p[j0], math.Inf(1), 0
			for j := 1; j <= k; j++ {
				if used[j] {
					continue
				}
				if cur := c(i0, j) - u[i0] - v[j]; cur < minv[j] {
					minv[j], way[j] = cur, j0
				}
				if minv[j] < delta {
					delta, j1 = minv[j], j
				}
			}
			for j := 0; j <= k; j++ {
				if used[j] {
					u[p[j]] += delta
					v[j] -= delta
				} else {
					minv[j] -= delta
				}
			}
			j0 = j1
			if p[j0] == 0 {
				break
			}
		}
		for j0 != 0 {
			j1 := way[j0]
			p[j0] = p[j1]
			j0 = j1
		}
	}
	to = make([]int, n)
	for i := range to {
		to[i] = -1
	}
	for j := 1; j <= k; j++ {
		if i := p[j]; i >= 1 && i <= n && j <= m {
			to[i-1] = j - 1
			total += cost[i-1][j-1]
		}
	}
	return to, total
}
