package exact

import (
	"errors"
	"math"
	"strings"
	"testing"
)

// gridMoves are up, down, right, left as (row, col) steps.
var gridMoves = [4][2]int{{-1, 0}, {1, 0}, {0, 1}, {0, -1}}

// suttonBartoGrid is the 4x4 gridworld of Sutton & Barto, Reinforcement
// Learning: An Introduction, 2nd ed., Example 4.1: states numbered row-major,
// the two opposite corners terminal, a deterministic move in each of four
// directions (off the grid means staying), reward -1 per step, i.e. cost 1.
func suttonBartoGrid() *MDP {
	p := &MDP{Actions: make([][]Action, 16), Terminal: make([]bool, 16), Discount: 1}
	p.Terminal[0], p.Terminal[15] = true, true
	for x := range 16 {
		r, c := x/4, x%4
		for _, d := range gridMoves {
			nr, nc := r+d[0], c+d[1]
			if nr < 0 || nr > 3 || nc < 0 || nc > 3 {
				nr, nc = r, c
			}
			p.Actions[x] = append(p.Actions[x], Action{Cost: 1, Next: []Transition{{nr*4 + nc, 1}}})
		}
	}
	return p
}

// Sutton & Barto, 2nd ed., Figure 4.1 (k = infinity column): the
// equiprobable random policy's values v; in cost terms J = -v.
func TestSuttonBartoRandomPolicy(t *testing.T) {
	p := suttonBartoGrid()
	probs := make([][]float64, 16)
	for x := range probs {
		probs[x] = []float64{0.25, 0.25, 0.25, 0.25}
	}
	want := []float64{
		0, -14, -20, -22,
		-14, -18, -20, -20,
		-20, -20, -18, -14,
		-22, -20, -14, 0,
	}
	for name, limit := range map[string]int{"lu": 3000, "gauss-seidel": 0} {
		t.Run(name, func(t *testing.T) {
			defer func(old int) { denseLimit = old }(denseLimit)
			denseLimit = limit
			J, err := EvaluateRandomized(p, probs)
			if err != nil {
				t.Fatal(err)
			}
			for x := range want {
				if math.Abs(-J[x]-want[x]) > 1e-9 {
					t.Errorf("v(%d) = %v, want %v", x, -J[x], want[x])
				}
			}
		})
	}
}

// Same grid, value iteration: the optimal cost is the number of steps to
// the nearer terminal corner (Sutton & Barto, 2nd ed., Example 4.1 / Figure 4.1
// greedy policy). Policy iteration from "always up" must agree.
func TestSuttonBartoOptimal(t *testing.T) {
	p := suttonBartoGrid()
	vi, err := ValueIteration(p, VIOptions{})
	if err != nil {
		t.Fatal(err)
	}
	// Exact after 3 sweeps (farthest state is 3 steps away), the 4th sees no change.
	if vi.Iter != 4 {
		t.Errorf("value iteration took %d sweeps, want 4", vi.Iter)
	}
	// "Always up" never leaves the top row, so starting there is refused.
	if _, _, _, err := PolicyIteration(p, nil, 0); !errors.Is(err, ErrSingular) {
		t.Fatalf("policy iteration from always-up: err = %v, want singular", err)
	}
	Jpi, _, _, err := PolicyIteration(p, vi.Policy, 0)
	if err != nil {
		t.Fatal(err)
	}
	for x := range 16 {
		r, c := x/4, x%4
		want := float64(min(r+c, 6-r-c))
		if vi.J[x] != want || Jpi[x] != want {
			t.Errorf("J*(%d) = %v (VI), %v (PI), want %v", x, vi.J[x], Jpi[x], want)
		}
		if !p.Terminal[x] {
			if q := p.Q(x, vi.Policy[x], vi.J); q != want {
				t.Errorf("greedy action at %d has Q %v, want %v", x, q, want)
			}
		}
	}
}

// aimaWorld is the 4x3 world of Russell & Norvig, Artificial Intelligence:
// A Modern Approach, 3rd ed., Section 17.1 (Figures 17.1-17.3): columns 1..4,
// rows 1..3, a wall at (2,2), terminals +1 at (4,3) and -1 at (4,2),
// R(s) = -0.04 elsewhere, the intended move w.p. 0.8 and each perpendicular
// move w.p. 0.1, bumping into the wall or the edge means staying. In cost
// form: stage cost 0.04, terminal values -1 and +1. It returns the MDP and
// the state number of each (col,row), -1 for the wall.
func aimaWorld() (*MDP, [5][4]int) {
	var id [5][4]int
	n := 0
	for row := 1; row <= 3; row++ {
		for col := 1; col <= 4; col++ {
			if col == 2 && row == 2 {
				id[col][row] = -1
				continue
			}
			id[col][row] = n
			n++
		}
	}
	p := &MDP{Actions: make([][]Action, n), Terminal: make([]bool, n), TerminalValue: make([]float64, n), Discount: 1}
	p.Terminal[id[4][3]], p.TerminalValue[id[4][3]] = true, -1
	p.Terminal[id[4][2]], p.TerminalValue[id[4][2]] = true, 1
	// (dcol, drow): north, south, east, west.
	dirs := [4][2]int{{0, 1}, {0, -1}, {1, 0}, {-1, 0}}
	perp := [4][2]int{{2, 3}, {2, 3}, {0, 1}, {0, 1}}
	for row := 1; row <= 3; row++ {
		for col := 1; col <= 4; col++ {
			x := id[col][row]
			if x < 0 || p.Terminal[x] {
				continue
			}
			dest := func(d int) int {
				c, r := col+dirs[d][0], row+dirs[d][1]
				if c < 1 || c > 4 || r < 1 || r > 3 || id[c][r] < 0 {
					return x
				}
				return id[c][r]
			}
			for d := range dirs {
				next := []Transition{{dest(d), 0.8}, {dest(perp[d][0]), 0.1}, {dest(perp[d][1]), 0.1}}
				p.Actions[x] = append(p.Actions[x], Action{Cost: 0.04, Next: next})
			}
		}
	}
	return p, id
}

// Russell & Norvig, AIMA 3rd ed., Figure 17.3: utilities of the 4x3 world
// with gamma = 1. The values are quoted from memory of the book and the
// figure is a table rounded to three decimals, hence the 0.001 tolerance.
func TestRussellNorvigUtilities(t *testing.T) {
	p, id := aimaWorld()
	vi, err := ValueIteration(p, VIOptions{Tol: 1e-12})
	if err != nil {
		t.Fatal(err)
	}
	want := map[[2]int]float64{
		{1, 3}: 0.812, {2, 3}: 0.868, {3, 3}: 0.918,
		{1, 2}: 0.762, {3, 2}: 0.660,
		{1, 1}: 0.705, {2, 1}: 0.655, {3, 1}: 0.611, {4, 1}: 0.388,
	}
	for cr, u := range want {
		got := -vi.J[id[cr[0]][cr[1]]]
		if math.Abs(got-u) > 0.001 {
			t.Errorf("U(%d,%d) = %.4f, want %.3f", cr[0], cr[1], got, u)
		}
	}
	// The greedy policy is proper, so exact evaluation must reproduce it.
	J, err := Evaluate(p, vi.Policy)
	if err != nil {
		t.Fatal(err)
	}
	for x := range J {
		if math.Abs(J[x]-vi.J[x]) > 1e-9 {
			t.Errorf("J(%d): evaluated %v, value iteration %v", x, J[x], vi.J[x])
		}
	}
}

func TestSingularRefused(t *testing.T) {
	// State 1 loops on itself forever: with a = 1, I - P is singular.
	p := &MDP{
		Actions: [][]Action{
			{{Cost: 1, Next: []Transition{{2, 1}}}, {Cost: 1, Next: []Transition{{1, 1}}}},
			{{Cost: 1, Next: []Transition{{1, 1}}}},
			nil,
		},
		Terminal: []bool{false, false, true},
		Discount: 1,
	}
	_, err := Evaluate(p, []int{0, 0, 0})
	if !errors.Is(err, ErrSingular) || !strings.Contains(err.Error(), "state 1") {
		t.Fatalf("err = %v, want singular at state 1", err)
	}
	if _, err := ValueIteration(p, VIOptions{MaxIter: 1000}); err == nil {
		t.Fatal("value iteration converged on a diverging problem")
	}
	// Discounted, the same chain is fine: J(1) = 1/(1-a).
	p.Discount = 0.5
	J, err := Evaluate(p, []int{1, 0, 0})
	if err != nil {
		t.Fatal(err)
	}
	if J[0] != 2 || J[1] != 2 {
		t.Fatalf("J = %v, want [2 2 0]", J)
	}
}

func TestValidate(t *testing.T) {
	bad := []*MDP{
		{Actions: [][]Action{{{Cost: 1, Next: []Transition{{0, 0.5}}}}}, Discount: 0.9},
		{Actions: [][]Action{{{Cost: 1, Next: []Transition{{1, 1}}}}}, Discount: 0.9},
		{Actions: [][]Action{{{Cost: 1, Next: []Transition{{0, 1}}}}}, Discount: 0},
		{Actions: [][]Action{{{Cost: 1, Next: []Transition{{0, 1}}}}}, Discount: 1.5},
		{Actions: [][]Action{nil}, Discount: 0.9},
	}
	for i, p := range bad {
		if err := p.Validate(); err == nil {
			t.Errorf("case %d: no error", i)
		}
	}
}

// Gauss-Seidel and LU must agree on a random dense-ish discounted chain.
func TestGaussSeidelMatchesLU(t *testing.T) {
	const n = 200
	p := &MDP{Actions: make([][]Action, n), Terminal: make([]bool, n), Discount: 0.97}
	seed := uint64(1)
	next := func() uint64 { seed = seed*6364136223846793005 + 1442695040888963407; return seed >> 11 }
	for x := range n {
		k := 1 + int(next()%5)
		var tr []Transition
		for range k {
			tr = append(tr, Transition{int(next() % n), 1 / float64(k)})
		}
		p.Actions[x] = []Action{{Cost: float64(next()%100) / 10, Next: tr}}
	}
	p.Terminal[7] = true
	mu := make([]int, n)
	lu, err := Evaluate(p, mu)
	if err != nil {
		t.Fatal(err)
	}
	defer func(old int) { denseLimit = old }(denseLimit)
	denseLimit = 0
	gs, err := Evaluate(p, mu)
	if err != nil {
		t.Fatal(err)
	}
	for x := range lu {
		if math.Abs(lu[x]-gs[x]) > 1e-9 {
			t.Fatalf("J(%d): LU %v, Gauss-Seidel %v", x, lu[x], gs[x])
		}
	}
}
