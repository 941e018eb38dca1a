package exact

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"reflect"
	"strings"
	"testing"

	"baton/sim/model"
)

// chase is a toy Enumerable: robots on a line of cells chase a target that
// steps left or right with probability drift each, staying otherwise (a
// step off the line is a bump: it stays). A step costs 1 plus 0.1 per
// moving robot; the episode ends when a robot and the target share a cell.
// Robots at an end of the line have 2 controls, elsewhere 3, so control
// counts vary by state and robot.
type chase struct {
	cells, robots int
	drift         float64
	discount      float64
	start         chaseState
	hold          bool // base policy holds instead of heading for the target
}

type chaseState struct {
	pos    [4]int
	target int
	done   bool
}

func (m *chase) Name() string                        { return "chase" }
func (m *chase) Robots() int                         { return m.robots }
func (m *chase) MaxControls() int                    { return 3 }
func (m *chase) NewState() model.State               { return new(chaseState) }
func (m *chase) CopyState(dst, src model.State)      { *dst.(*chaseState) = *src.(*chaseState) }
func (m *chase) Start(dst model.State, _ *rand.Rand) { *dst.(*chaseState) = m.start }
func (m *chase) Terminal(s model.State) bool         { return s.(*chaseState).done }
func (m *chase) Discount() float64                   { return m.discount }
func (m *chase) Horizon() int                        { return 100 }

func (m *chase) NumControls(s model.State, r int) int {
	if p := s.(*chaseState).pos[r]; p == 0 || p == m.cells-1 {
		return 2
	}
	return 3
}

// move is where control c takes a robot at p: 0 stays, then the legal
// steps, left before right.
func (m *chase) move(p, c int) int {
	switch {
	case c == 0:
		return p
	case c == 1 && p > 0:
		return p - 1
	default:
		return p + 1
	}
}

func (m *chase) Base(s model.State, r int) int {
	st := s.(*chaseState)
	p := st.pos[r]
	switch {
	case m.hold || p == st.target:
		return 0
	case p > st.target:
		return 1
	case p == 0:
		return 1
	default:
		return 2
	}
}

// Outcomes emits one outcome per target step even when two land on the same
// cell, so Enumerate's merging is exercised.
func (m *chase) Outcomes(s model.State, u []int, fn func(model.State, float64, float64)) {
	st := *s.(*chaseState)
	cost := 1.0
	for r := range m.robots {
		if u[r] != 0 {
			cost += 0.1
		}
		st.pos[r] = m.move(st.pos[r], u[r])
	}
	if m.caught(&st) {
		st.done = true
		fn(&st, 1, cost)
		return
	}
	t := st.target
	for i, d := range []int{-1, 0, 1} {
		p := m.drift
		if i == 1 {
			p = 1 - 2*m.drift
		}
		next := st
		next.target = min(max(t+d, 0), m.cells-1)
		next.done = m.caught(&next)
		fn(&next, p, cost)
	}
}

func (m *chase) caught(st *chaseState) bool {
	for r := range m.robots {
		if st.pos[r] == st.target {
			return true
		}
	}
	return false
}

func (m *chase) Step(s model.State, u []int, rng *rand.Rand) float64 {
	if m.Terminal(s) {
		return 0
	}
	x := rng.Float64()
	var g float64
	m.Outcomes(s, u, func(next model.State, p, cost float64) {
		if x >= 0 && x < p {
			m.CopyState(s, next)
			g = cost
		}
		x -= p
	})
	return g
}

func (m *chase) Key(s model.State) string {
	st := s.(*chaseState)
	if st.done {
		return "done" // every finished state is the same absorbing state
	}
	return fmt.Sprintf("%v|%d", st.pos[:m.robots], st.target)
}

// newChase has two robots at the left end and the target at the right.
func newChase(discount float64) *chase {
	return &chase{cells: 5, robots: 2, drift: 0.25, discount: discount,
		start: chaseState{pos: [4]int{0, 1}, target: 4}}
}

func enumerate(t *testing.T, m model.Enumerable) *Space {
	t.Helper()
	s := m.NewState()
	m.Start(s, nil)
	sp, err := Enumerate(m, s, 10000)
	if err != nil {
		t.Fatal(err)
	}
	return sp
}

func TestEnumerateChase(t *testing.T) {
	m := newChase(0.9)
	sp := enumerate(t, m)
	// Neither a robot nor the target can step over the other without a
	// catch, so both robots stay left of the target: sum over target cells
	// t of t*t robot placements, plus the one merged finished state.
	if want := 1 + 4 + 9 + 16 + 1; sp.Len() != want {
		t.Fatalf("%d states, want %d", sp.Len(), want)
	}
	if sp.Keys[0] != "[0 1]|4" {
		t.Fatalf("state 0 is %q, want the start", sp.Keys[0])
	}
	// At the start the target is at the right end: a right step bumps and
	// stays, so its outcomes merge with staying.
	x := 0
	j := sp.Encode(x, []int{0, 0})
	next := sp.MDP.Actions[x][j].Next
	if len(next) != 2 || next[0].P != 0.25 || next[1].P != 0.75 {
		t.Fatalf("start, hold: outcomes %v, want 0.25 left and 0.75 stay", next)
	}
	// Same instance twice: same numbering.
	if again := enumerate(t, m); !reflect.DeepEqual(again.Keys, sp.Keys) {
		t.Fatal("enumeration is not deterministic")
	}
}

func TestEnumerateRefusesLarge(t *testing.T) {
	m := newChase(0.9)
	s := m.NewState()
	m.Start(s, nil)
	_, err := Enumerate(m, s, 10)
	if err == nil || !strings.Contains(err.Error(), "instance too large to enumerate: more than 10 states") {
		t.Fatalf("err = %v", err)
	}
}

func TestMixedRadix(t *testing.T) {
	m := newChase(0.9)
	sp := enumerate(t, m)
	x := 0 // robot 0 at the end (2 controls), robot 1 inside (3 controls)
	if sp.Controls(x, 0) != 2 || sp.Controls(x, 1) != 3 || sp.NumJoint(x) != 6 {
		t.Fatalf("controls %d,%d joint %d", sp.Controls(x, 0), sp.Controls(x, 1), sp.NumJoint(x))
	}
	u := make([]int, 2)
	for j := range 6 {
		sp.Decode(x, j, u)
		if u[0] != j/3 || u[1] != j%3 || sp.Encode(x, u) != j {
			t.Errorf("joint %d decodes to %v", j, u)
		}
		for r := range 2 {
			if sp.controlOf(x, j, r) != u[r] {
				t.Errorf("controlOf(%d,%d) = %d, want %d", j, r, sp.controlOf(x, j, r), u[r])
			}
		}
	}
	done, ok := sp.Index("done")
	if !ok || !sp.Terminal(done) || sp.NumJoint(done) != 0 {
		t.Fatal("finished state missing or not terminal")
	}
}

func TestQFactorCounts(t *testing.T) {
	m := &chase{cells: 7, robots: 3, drift: 0.25, discount: 0.9,
		start: chaseState{pos: [4]int{0, 1, 2}, target: 6}}
	sp := enumerate(t, m)
	mu := BasePolicy(sp)
	J, err := EvaluatePolicy(sp, mu)
	if err != nil {
		t.Fatal(err)
	}
	all := AllAtOnce(sp, J)
	one := OneAtATime(sp, mu, J, []int{2, 0, 1})
	wantAll, wantOne := 0, 0
	for x := range sp.Len() {
		prod, sum := 1, 0
		if sp.Terminal(x) {
			prod = 0
		}
		for r := range 3 {
			prod *= max(sp.Controls(x, r), 0)
			sum += sp.Controls(x, r)
		}
		if all.QEvals[x] != prod || one.QEvals[x] != sum {
			t.Fatalf("state %q: %d and %d Q-factors, want %d and %d", sp.Keys[x], all.QEvals[x], one.QEvals[x], prod, sum)
		}
		wantAll += prod
		wantOne += sum
	}
	if all.TotalQEvals() != wantAll || one.TotalQEvals() != wantOne {
		t.Fatal("totals disagree")
	}
	// The all-at-once choice really is the minimum over joint controls.
	for x := range sp.Len() {
		for j := range sp.NumJoint(x) {
			if sp.Q(x, j, J) < sp.Q(x, all.Policy[x], J) {
				t.Fatalf("state %d: joint %d beats the all-at-once choice", x, j)
			}
		}
	}
}

// pick is a one-shot assignment toy with a constant control count: each of
// the robots picks one of n tasks; the cost is the number of tasks left
// unpicked plus 0.5 per extra robot on a task. Used for the design's check
// value of 4 robots x 5 controls: 625 joint Q-factors versus 20.
type pick struct{ robots, tasks int }

type pickState struct{ done bool }

func (m *pick) Name() string                        { return "pick" }
func (m *pick) Robots() int                         { return m.robots }
func (m *pick) MaxControls() int                    { return m.tasks }
func (m *pick) NewState() model.State               { return new(pickState) }
func (m *pick) CopyState(dst, src model.State)      { *dst.(*pickState) = *src.(*pickState) }
func (m *pick) Start(dst model.State, _ *rand.Rand) { *dst.(*pickState) = pickState{} }
func (m *pick) NumControls(model.State, int) int    { return m.tasks }
func (m *pick) Terminal(s model.State) bool         { return s.(*pickState).done }
func (m *pick) Discount() float64                   { return 1 }
func (m *pick) Horizon() int                        { return 1 }
func (m *pick) Base(model.State, int) int           { return 0 } // everybody takes task 0

func (m *pick) cost(u []int) float64 {
	seen := make([]int, m.tasks)
	for _, c := range u {
		seen[c]++
	}
	g := 0.0
	for _, k := range seen {
		if k == 0 {
			g++
		} else {
			g += 0.5 * float64(k-1)
		}
	}
	return g
}

func (m *pick) Step(s model.State, u []int, _ *rand.Rand) float64 {
	if m.Terminal(s) {
		return 0
	}
	s.(*pickState).done = true
	return m.cost(u)
}

func (m *pick) Outcomes(_ model.State, u []int, fn func(model.State, float64, float64)) {
	fn(&pickState{done: true}, 1, m.cost(u))
}

func (m *pick) Key(s model.State) string { return fmt.Sprint(s.(*pickState).done) }

func TestPickCheckValue(t *testing.T) {
	m := &pick{robots: 4, tasks: 5}
	sp := enumerate(t, m)
	mu := BasePolicy(sp)
	J, err := EvaluatePolicy(sp, mu)
	if err != nil {
		t.Fatal(err)
	}
	all := AllAtOnce(sp, J)
	one := OneAtATime(sp, mu, J, []int{0, 1, 2, 3})
	if all.QEvals[0] != 625 || one.QEvals[0] != 20 {
		t.Fatalf("%d and %d Q-factors, want 625 and 20", all.QEvals[0], one.QEvals[0])
	}
	// Base: all on task 0, 4 uncovered + 1.5 crowding. Both rollouts spread
	// the robots, leaving 1 task uncovered. One at a time, robot 0 leaves
	// the crowd first (to the lowest free task), and robot 3, alone on task 0
	// by then, keeps its base control.
	Ja, _ := EvaluatePolicy(sp, all.Policy)
	Jo, _ := EvaluatePolicy(sp, one.Policy)
	if J[0] != 5.5 || Ja[0] != 1 || Jo[0] != 1 {
		t.Fatalf("base %v, all-at-once %v, one-at-a-time %v", J[0], Ja[0], Jo[0])
	}
	u := make([]int, 4)
	sp.Decode(0, one.Policy[0], u)
	if !reflect.DeepEqual(u, []int{1, 2, 3, 0}) {
		t.Fatalf("one-at-a-time chose %v", u)
	}
}

// checkTheorems verifies, at every enumerated state, the cost improvement
// of both rollouts over the base policy and optimality of value iteration,
// then runs repeated one-at-a-time improvement to a fixed point.
func checkTheorems(t *testing.T, sp *Space, order []int) {
	t.Helper()
	const tol = 1e-9
	base := BasePolicy(sp)
	Jb, err := EvaluatePolicy(sp, base)
	if err != nil {
		t.Fatal(err)
	}
	Ja, err := EvaluatePolicy(sp, AllAtOnce(sp, Jb).Policy)
	if err != nil {
		t.Fatal(err)
	}
	Jo, err := EvaluatePolicy(sp, OneAtATime(sp, base, Jb, order).Policy)
	if err != nil {
		t.Fatal(err)
	}
	Jopt, _, err := Optimal(sp)
	if err != nil {
		t.Fatal(err)
	}
	improved := false
	for x := range sp.Len() {
		if Ja[x] > Jb[x]+tol || Jo[x] > Jb[x]+tol {
			t.Errorf("state %q: base %v, all-at-once %v, one-at-a-time %v", sp.Keys[x], Jb[x], Ja[x], Jo[x])
		}
		if Jopt[x] > min(Ja[x], Jo[x])+tol {
			t.Errorf("state %q: optimum %v above a rollout (%v, %v)", sp.Keys[x], Jopt[x], Ja[x], Jo[x])
		}
		improved = improved || Jo[x] < Jb[x]-tol
	}
	imp, err := ImproveUntilStable(sp, base, order, 50)
	if err != nil {
		t.Fatal(err)
	}
	for i := 1; i < len(imp.Costs); i++ {
		if imp.Costs[i] > imp.Costs[i-1]+tol {
			t.Errorf("improvement step %d raised the cost: %v", i, imp.Costs)
		}
	}
	if len(imp.Costs) != imp.Steps+1 {
		t.Errorf("%d costs for %d steps", len(imp.Costs), imp.Steps)
	}
	if !AgentByAgentOptimal(sp, imp.Policy, imp.J, tol) {
		t.Error("fixed point of one-at-a-time improvement is not agent-by-agent optimal")
	}
	for x := range sp.Len() {
		if imp.J[x] > Jo[x]+tol || imp.J[x] < Jopt[x]-tol {
			t.Errorf("state %q: fixed point %v outside [optimum %v, rollout %v]", sp.Keys[x], imp.J[x], Jopt[x], Jo[x])
		}
	}
	t.Logf("%d states; start: base %.4f, all-at-once %.4f, one-at-a-time %.4f, optimum %.4f; %d improvement steps to %.4f; rollout improves somewhere: %v",
		sp.Len(), Jb[0], Ja[0], Jo[0], Jopt[0], imp.Steps, imp.J[0], improved)
}

func TestChaseTheorems(t *testing.T) {
	for _, a := range []float64{0.9, 1} {
		m := newChase(a)
		m.start = chaseState{pos: [4]int{0, 6}, target: 3}
		m.cells = 7
		t.Run(fmt.Sprint("discount=", a), func(t *testing.T) {
			sp := enumerate(t, m)
			checkTheorems(t, sp, []int{0, 1})
			checkTheorems(t, sp, []int{1, 0})
		})
	}
	m := &chase{cells: 6, robots: 3, drift: 0.3, discount: 0.95, start: chaseState{pos: [4]int{0, 1, 5}, target: 3}}
	t.Run("three robots", func(t *testing.T) {
		checkTheorems(t, enumerate(t, m), []int{2, 0, 1})
	})
	m = &chase{cells: 6, robots: 2, drift: 0.25, discount: 0.95, hold: true, start: chaseState{pos: [4]int{0, 5}, target: 2}}
	t.Run("holding base", func(t *testing.T) {
		checkTheorems(t, enumerate(t, m), []int{0, 1})
	})
}

func TestSolve(t *testing.T) {
	m := newChase(0.9)
	s := m.NewState()
	m.Start(s, nil)
	rep, err := Solve(m, s, 1000)
	if err != nil {
		t.Fatal(err)
	}
	if rep.States != 31 || !(rep.Optimal <= rep.OneAtATime+1e-9 && rep.OneAtATime <= rep.Base+1e-9 && rep.AllAtOnce <= rep.Base+1e-9) {
		t.Fatalf("report %+v", rep)
	}
	again, _ := Solve(m, s, 1000)
	if again != rep {
		t.Fatalf("not deterministic: %+v then %+v", rep, again)
	}
	b, _ := json.Marshal(rep)
	for _, k := range []string{`"optimal":`, `"base":`, `"all_at_once":`, `"one_at_a_time":`, `"states":31`} {
		if !strings.Contains(string(b), k) {
			t.Errorf("JSON %s lacks %s", b, k)
		}
	}
}

// An undiscounted instance whose base policy never finishes (robots hold,
// the target never moves) must be refused, not answered with garbage.
func TestSolveRefusesSingular(t *testing.T) {
	m := &chase{cells: 4, robots: 2, drift: 0, discount: 1, hold: true, start: chaseState{pos: [4]int{0, 3}, target: 1}}
	s := m.NewState()
	m.Start(s, nil)
	_, err := Solve(m, s, 1000)
	if !errors.Is(err, ErrSingular) || !strings.Contains(err.Error(), "base policy") {
		t.Fatalf("err = %v", err)
	}
	// Discounted, the same instance is fine: holding costs 1/(1-a).
	m.discount = 0.5
	rep, err := Solve(m, s, 1000)
	if err != nil {
		t.Fatal(err)
	}
	if rep.Base != 2 || math.Abs(rep.Optimal-1.1) > 1e-12 {
		t.Fatalf("report %+v", rep)
	}
}

func TestOneAtATimePanicsOnBadOrder(t *testing.T) {
	sp := enumerate(t, newChase(0.9))
	defer func() {
		if recover() == nil {
			t.Fatal("no panic")
		}
	}()
	OneAtATime(sp, BasePolicy(sp), make([]float64, sp.Len()), []int{0, 0})
}
