package assign

import (
	"math"
	"math/rand/v2"
	"testing"
)

// A worked example of the assignment problem as commonly taught with the
// Hungarian method (three workers, three jobs; each is cheapest at a job
// of its own, so the optimum is the diagonal of 2s: 6). The figures are
// from memory of the usual textbook illustration.
func TestWorkedExample(t *testing.T) {
	// The published example of a reference library: SciPy's
	// scipy.optimize.linear_sum_assignment documentation (its Examples
	// section) solves this matrix to columns [1, 0, 2] at a total of 5.
	to, total := Solve([][]float64{{4, 1, 3}, {2, 0, 5}, {3, 2, 2}})
	if total != 5 || to[0] != 1 || to[1] != 0 || to[2] != 2 {
		t.Fatalf("SciPy's example: %v %g, want [1 0 2] at 5", to, total)
	}
	to, total = Solve([][]float64{{2, 3, 3}, {3, 2, 3}, {3, 3, 2}})
	if total != 6 || to[0] != 0 || to[1] != 1 || to[2] != 2 {
		t.Fatalf("%v %g, want the diagonal at 6", to, total)
	}
	// A matrix whose optimum is not greedy: row 0's cheapest column is
	// also row 1's only cheap one.
	to, total = Solve([][]float64{{1, 2}, {1, 9}})
	if total != 3 || to[0] != 1 || to[1] != 0 {
		t.Fatalf("%v %g, want 0->1, 1->0 at 3", to, total)
	}
}

// Against the definition, on random matrices: the least total over every
// assignment, found by enumeration (square, more rows, more columns).
func TestAgainstEnumeration(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	for trial := range 300 {
		n, m := 1+rng.IntN(6), 1+rng.IntN(6)
		cost := make([][]float64, n)
		for i := range cost {
			cost[i] = make([]float64, m)
			for j := range cost[i] {
				cost[i][j] = float64(rng.IntN(20))
			}
		}
		to, total := Solve(cost)
		best := enumerate(cost, 0, make([]bool, m), 0)
		if math.Abs(total-best) > 1e-9 {
			t.Fatalf("trial %d: %v gives %g, the best is %g (%v)", trial, to, total, best, cost)
		}
		seen := map[int]bool{}
		assigned, sum := 0, 0.0
		for i, j := range to {
			if j < 0 {
				continue
			}
			if seen[j] {
				t.Fatalf("trial %d: column %d twice", trial, j)
			}
			seen[j] = true
			assigned++
			sum += cost[i][j]
		}
		if assigned != min(n, m) || sum != total {
			t.Fatalf("trial %d: %d assigned (want %d), sum %g total %g", trial, assigned, min(n, m), sum, total)
		}
	}
}

// enumerate is the least total cost of assigning rows i.. to free columns
// (every row gets one while columns last).
func enumerate(cost [][]float64, i int, used []bool, acc float64) float64 {
	n, m := len(cost), len(cost[0])
	if i == n {
		return acc
	}
	free := 0
	for _, u := range used {
		if !u {
			free++
		}
	}
	best := math.Inf(1)
	if n-i > free { // more rows left than columns: this row may go without
		best = enumerate(cost, i+1, used, acc)
	}
	for j := range m {
		if !used[j] {
			used[j] = true
			best = min(best, enumerate(cost, i+1, used, acc+cost[i][j]))
			used[j] = false
		}
	}
	return best
}
