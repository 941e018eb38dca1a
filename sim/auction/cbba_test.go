package auction

import (
	"errors"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
)

// onLine is the time-discounted reward for agents and tasks at points of a
// line, travelling one unit of distance per unit of time.
func onLine(lambda float64, agents, tasks []float64) TimeDiscounted {
	return TimeDiscounted{
		Lambda:    lambda,
		FromAgent: func(i, j int) float64 { return math.Abs(agents[i] - tasks[j]) },
		Between:   func(a, b int) float64 { return math.Abs(tasks[a] - tasks[b]) },
	}
}

// lineGraph: agent i hears i-1 and i+1, so information crosses the fleet
// in n-1 rounds.
func lineGraph(n int) [][]int {
	nb := make([][]int, n)
	for i := range n {
		if i > 0 {
			nb[i] = append(nb[i], i-1)
		}
		if i+1 < n {
			nb[i] = append(nb[i], i+1)
		}
	}
	return nb
}

// The worked example. Sources: the algorithm and its time-discounted
// reward are Choi, Brunet and How (IEEE T-RO 25(4), 2009); that with DMG
// scores and a connected network CBBA ends with the sequential greedy
// algorithm's (SGA's) assignment is the paper's Theorem 1, cited from
// memory. The SGA result below is computed by hand.
//
// On a line, lambda = 1/2, at most Lt = 2 tasks per agent, a score of
// lambda^(arrival time) per task (speed 1, no service time):
//
//	agents a0 = 4, a1 = 5, a2 = 11;  tasks t0 = 0, t1 = 1, t2 = 3, t3 = 9
//
// SGA, step 1 (empty bundles), score lambda^distance:
//
//	a0: t0 1/16  t1 1/8    t2 1/2    t3 1/32
//	a1: t0 1/32  t1 1/16   t2 1/4    t3 1/16
//	a2: t0 2^-11 t1 2^-10  t2 1/256  t3 1/4
//
// the best is (a0, t2) at 1/2. Step 2: a0's path is [t2] (arrival 1);
// appending t1 arrives at 1+2 = 3 (1/8), t0 at 1+3 = 4 (1/16), and
// putting either before t2 costs t2 more than it gains. a1 still has
// 1/16 for t1 and t3, a2 has 1/4 for t3: the best is (a2, t3) at 1/4.
// Step 3: a2's path [t3] (arrival 2) makes t0 and t1 worth 2^-11 and
// 2^-10 to it, so the best is (a0, t1) at 1/8, and a0 is full. Step 4:
// only t0 is left, worth 1/32 to a1 and at most 2^-11 to a2: (a1, t0).
// Paths: a0 [t2 t1], a1 [t0], a2 [t3]; total 1/2+1/4+1/8+1/32 = 29/32.
//
// CBBA gets there by a conflict: in round 1 a0 bids [t2 t1] (1/2, 1/8),
// a1 bids [t2 t1] (1/4, 1/16) and a2 [t3 t2] (1/4, 1/256); consensus gives
// t2 and t1 to a0, so a1 drops both and a2 drops t2. In round 2 a1 bids
// 1/32 for t0, beating a2's 2^-11 bid made the same round. Nothing
// changes after round 2.
func TestHandWorkedExample(t *testing.T) {
	td := onLine(0.5, []float64{4, 5, 11}, []float64{0, 1, 3, 9})
	p := Problem{Agents: 3, Tasks: 4, Bundle: 2, Score: td.Score}
	res, err := Solve(p)
	if err != nil {
		t.Fatal(err)
	}
	want := [][]int{{2, 1}, {0}, {3}}
	if !equalPaths(res.Paths, want) {
		t.Fatalf("paths %v, want %v (hand-computed SGA)", res.Paths, want)
	}
	total := 0.0
	for i, path := range res.Paths {
		total += Total(td.Score, i, path)
	}
	if total != 29.0/32 {
		t.Errorf("total score %v, want 29/32", total)
	}
	if !equalPaths(sequentialGreedy(p), want) {
		t.Errorf("the reference SGA gives %v, want %v", sequentialGreedy(p), want)
	}
	// Everyone hears everyone: D = 1, so two quiet rounds confirm round 2.
	if res.Settled != 2 || res.Diameter != 1 || res.Rounds != 4 || res.Messages != 4*3*2 {
		t.Errorf("stats %+v, want settled in round 2, D 1, 4 rounds, 24 messages", res.Stats)
	}
}

// Consensus travels one hop per round (the paper's bound grows with the
// diameter D): on the worked example a line graph a0 - a1 - a2 reaches the
// same assignment, later.
func TestLineGraphNeedsMoreRounds(t *testing.T) {
	td := onLine(0.5, []float64{4, 5, 11}, []float64{0, 1, 3, 9})
	full, err := Solve(Problem{Agents: 3, Tasks: 4, Bundle: 2, Score: td.Score})
	if err != nil {
		t.Fatal(err)
	}
	line, err := Solve(Problem{Agents: 3, Tasks: 4, Bundle: 2, Score: td.Score, Neighbours: lineGraph(3)})
	if err != nil {
		t.Fatal(err)
	}
	if !equalPaths(line.Paths, full.Paths) {
		t.Fatalf("line graph paths %v, full graph %v", line.Paths, full.Paths)
	}
	if line.Diameter != 2 || line.Settled <= full.Settled {
		t.Fatalf("line graph: D %d, settled in round %d; full graph settled in round %d", line.Diameter, line.Settled, full.Settled)
	}
	// Four messages a round on the line (two ends hear one, the middle two).
	if line.Messages != 4*line.Rounds {
		t.Errorf("line graph: %d messages in %d rounds, want 4 a round", line.Messages, line.Rounds)
	}
}

// gridProblem is a seeded random instance: agents and tasks on a small
// grid with Manhattan travel times (integers, so exact ties are common
// and the tie rules matter), a random discount, half the time random
// service times.
func gridProblem(seed uint64) Problem {
	rng := rand.New(rand.NewPCG(seed, 0x63626261)) // "cbba"
	na, nt, w := 1+rng.IntN(6), rng.IntN(9), 3+rng.IntN(8)
	type pt struct{ x, y int }
	agents, tasks := make([]pt, na), make([]pt, nt)
	for i := range agents {
		agents[i] = pt{rng.IntN(w), rng.IntN(w)}
	}
	for j := range tasks {
		tasks[j] = pt{rng.IntN(w), rng.IntN(w)}
	}
	d := func(a, b pt) float64 { return math.Abs(float64(a.x-b.x)) + math.Abs(float64(a.y-b.y)) }
	td := TimeDiscounted{
		Lambda:    0.5 + 0.45*rng.Float64(),
		FromAgent: func(i, j int) float64 { return d(agents[i], tasks[j]) },
		Between:   func(a, b int) float64 { return d(tasks[a], tasks[b]) },
	}
	if rng.IntN(2) == 0 {
		td.Service = make([]float64, nt)
		for j := range td.Service {
			td.Service[j] = float64(rng.IntN(3))
		}
	}
	return Problem{Agents: na, Tasks: nt, Bundle: 1 + rng.IntN(3), Score: td.Score}
}

// Property test, 200 seeded instances on the full graph and on a line.
// Sources: the paper's Theorem 1 (from memory): with DMG scores on a
// connected network CBBA's assignment is SGA's and it converges within
// min(Nt, Na*Lt)*D rounds. Checked here:
//   - every instance: the result is conflict-free (a task in at most one
//     path, at most Lt tasks per path), the definition of a feasible
//     assignment in the paper's problem statement;
//   - instances whose scores are DMG (checked exhaustively, the theorem's
//     hypothesis): the paths equal the separately written SGA's, and the
//     auction settles by round (n+1)*max(D,1), n the tasks assigned. That
//     is one D above the theorem's n*D: our rounds count from 1 and the
//     first round's bids, made before any consensus, take up to D rounds to
//     be withdrawn; in a wider search (20000 instances) lines took up to
//     4 rounds over n*D, never more than (n+1)*D.
func TestMatchesSequentialGreedy(t *testing.T) {
	const seeds = 200
	dmgCount := 0
	for seed := uint64(1); seed <= seeds; seed++ {
		p := gridProblem(seed)
		isDMG := dmgHolds(p)
		if isDMG {
			dmgCount++
		}
		want := sequentialGreedy(p)
		for _, g := range []struct {
			name string
			nb   [][]int
		}{{"full", nil}, {"line", lineGraph(p.Agents)}} {
			q := p
			q.Neighbours = g.nb
			res, err := Solve(q)
			if err != nil {
				if isDMG || !errors.Is(err, ErrNotSettled) {
					t.Fatalf("seed %d, %s graph: %v", seed, g.name, err)
				}
				continue // no guarantee without DMG
			}
			if msg := conflict(q, res.Paths); msg != "" {
				t.Fatalf("seed %d, %s graph: %s", seed, g.name, msg)
			}
			if !isDMG {
				continue
			}
			if !equalPaths(res.Paths, want) {
				t.Fatalf("seed %d, %s graph: CBBA %v, SGA %v", seed, g.name, res.Paths, want)
			}
			n := 0
			for _, path := range res.Paths {
				n += len(path)
			}
			if bound := (n + 1) * max(res.Diameter, 1); res.Settled > bound {
				t.Fatalf("seed %d, %s graph: settled in round %d, over (n+1)*D = %d", seed, g.name, res.Settled, bound)
			}
			if res.Rounds != res.Settled+res.Diameter+1 && n > 0 {
				t.Fatalf("seed %d, %s graph: %d rounds, settled in %d with D %d", seed, g.name, res.Rounds, res.Settled, res.Diameter)
			}
		}
	}
	t.Logf("%d of %d instances have DMG scores", dmgCount, seeds)
	// Most instances must test the theorem, not just feasibility.
	if dmgCount < seeds*3/4 {
		t.Fatalf("only %d of %d instances have DMG scores", dmgCount, seeds)
	}
}

// The time-discounted reward with best-position insertion is not always
// DMG, though it is often said to be (source: the counterexample is
// computed here by hand). On a line with lambda = 0.9: an agent at 0,
// tasks m = 10, k = -5, j = -1. With bundle [m], j is worth at most
// max(0.9 + 0.9^12 - 0.9^10, 0.9^21) = 0.8337 (first: it delays m by 2;
// last: arrival 21). Adding k to the bundle puts it first (path [k m]:
// 0.9^5 + 0.9^20 beats [m k]), and then j, on the way to k, is worth 0.9^1
// = 0.9 without delaying anything: the marginal gain grew.
func TestTimeDiscountedCanViolateDMG(t *testing.T) {
	td := onLine(0.9, []float64{0}, []float64{10, -5, -1}) // m, k, j
	p := Problem{Agents: 1, Tasks: 3, Bundle: 3, Score: td.Score}
	_, before := bestGain(p, 0, []int{0}, 2)
	n, _ := bestGain(p, 0, []int{0}, 1)
	if n != 0 {
		t.Fatalf("k goes to position %d of [m], want 0", n)
	}
	_, after := bestGain(p, 0, []int{1, 0}, 2)
	if want := 0.9 + math.Pow(0.9, 12) - math.Pow(0.9, 10); math.Abs(before-want) > 1e-12 {
		t.Fatalf("gain of j after [m]: %v, want %v", before, want)
	}
	if after != 0.9 || after <= before {
		t.Fatalf("gain of j after [k m]: %v, before adding k %v: want 0.9, more", after, before)
	}
	if dmgHolds(p) {
		t.Fatal("dmgHolds missed the violation")
	}
}

// Without DMG the auction need not settle, and Solve says so (source: the
// instance, found by a seeded search and traced by hand). Four agents on a
// grid, two tasks t2, t3 on one cell: agent 0 bids for t2 after its t0 at
// lambda^6 (the detour delays t0), and then for t3 at lambda^2, since the
// detour is paid. Agent 3 outbids the lower bid (lambda^5), agent 0 drops
// that task and the other after it, bids for both again the other way
// round, and so on with period 4.
func TestNotSettledIsFlagged(t *testing.T) {
	type pt struct{ x, y int }
	agents := []pt{{2, 2}, {4, 0}, {0, 0}, {0, 1}}
	tasks := []pt{{3, 1}, {2, 5}, {2, 4}, {2, 4}}
	d := func(a, b pt) float64 { return math.Abs(float64(a.x-b.x)) + math.Abs(float64(a.y-b.y)) }
	td := TimeDiscounted{
		Lambda:    0.9,
		FromAgent: func(i, j int) float64 { return d(agents[i], tasks[j]) },
		Between:   func(a, b int) float64 { return d(tasks[a], tasks[b]) },
	}
	p := Problem{Agents: 4, Tasks: 4, Bundle: 3, Score: td.Score}
	if dmgHolds(p) {
		t.Fatal("the instance's scores are DMG")
	}
	res, err := Solve(p)
	if !errors.Is(err, ErrNotSettled) {
		t.Fatalf("err %v, want ErrNotSettled", err)
	}
	if res.Rounds != DefaultMaxRounds(p) || res.Settled != res.Rounds || len(res.Paths) != 4 {
		t.Fatalf("stats %+v, %d paths; want the cap's %d rounds, changing to the end, 4 paths", res.Stats, len(res.Paths), DefaultMaxRounds(p))
	}
}

func TestSolveEdgeCases(t *testing.T) {
	score := onLine(0.5, []float64{0, 1}, []float64{2}).Score
	res, err := Solve(Problem{Agents: 2, Tasks: 0, Bundle: 1, Score: score})
	if err != nil || res.Rounds != 0 || res.Messages != 0 || len(res.Paths) != 2 {
		t.Errorf("no tasks: %+v, %v; want no round, no message, 2 empty paths", res, err)
	}
	// A lone agent has nobody to talk to: D = 0, one quiet round.
	res, err = Solve(Problem{Agents: 1, Tasks: 1, Bundle: 1, Score: onLine(0.5, []float64{0}, []float64{2}).Score})
	if err != nil || !equalPaths(res.Paths, [][]int{{0}}) || res.Rounds != 2 || res.Messages != 0 {
		t.Errorf("lone agent: %+v, %v", res, err)
	}
	for _, p := range []Problem{
		{Agents: 0, Tasks: 1, Bundle: 1, Score: score},
		{Agents: 2, Tasks: -1, Bundle: 1, Score: score},
		{Agents: 2, Tasks: MaxTasks + 1, Bundle: 1, Score: score},
		{Agents: 2, Tasks: 1, Bundle: 0, Score: score},
		{Agents: 2, Tasks: 1, Bundle: MaxBundle + 1, Score: score},
		{Agents: 2, Tasks: 1, Bundle: 1},
		{Agents: 2, Tasks: 1, Bundle: 1, Score: score, Neighbours: [][]int{{1}}},
		{Agents: 2, Tasks: 1, Bundle: 1, Score: score, Neighbours: [][]int{{0}, {0}}},
		{Agents: 2, Tasks: 1, Bundle: 1, Score: score, Neighbours: [][]int{{1, 1}, {0}}},
		{Agents: 2, Tasks: 1, Bundle: 1, Score: score, Neighbours: [][]int{{2}, {0}}},
	} {
		if _, err := Solve(p); err == nil || errors.Is(err, ErrNotSettled) {
			t.Errorf("%+v: err %v, want a validation error", p, err)
		}
	}
}

// sequentialGreedy is SGA, written apart from Solve: repeatedly give the
// (agent, task) pair with the highest marginal score to that agent, at the
// task's best position, until no agent with room has a positive gain.
// Ties: the lower task, then the lower agent, then the earlier position,
// the order CBBA's own tie rules produce.
func sequentialGreedy(p Problem) [][]int {
	paths := make([][]int, p.Agents)
	taken := make([]bool, p.Tasks)
	for {
		bi, bj, bn, bc := -1, -1, 0, 0.0
		for j := range p.Tasks {
			if taken[j] {
				continue
			}
			for i := range p.Agents {
				if len(paths[i]) >= p.Bundle {
					continue
				}
				if n, c := bestGain(p, i, paths[i], j); c > 0 && (bi < 0 || c > bc) {
					bi, bj, bn, bc = i, j, n, c
				}
			}
		}
		if bi < 0 {
			return paths
		}
		taken[bj] = true
		paths[bi] = slices.Insert(paths[bi], bn, bj)
	}
}

// bestGain is the best position for task j in agent i's path and its
// marginal gain: j's value plus the other tasks' changes, in path order
// (the Score contract's definition).
func bestGain(p Problem, i int, path []int, j int) (int, float64) {
	before := make([]float64, len(path))
	p.Score(i, path, before)
	bestN, best := -1, 0.0
	for n := 0; n <= len(path); n++ {
		np := slices.Insert(slices.Clone(path), n, j)
		after := make([]float64, len(np))
		p.Score(i, np, after)
		c := after[n]
		for m := range np {
			switch {
			case m < n:
				c += after[m] - before[m]
			case m > n:
				c += after[m] - before[m-1]
			}
		}
		if bestN < 0 || c > best {
			bestN, best = n, c
		}
	}
	return bestN, best
}

// dmgHolds checks diminishing marginal gain exhaustively: for every agent
// and every bundle it can build (up to Lt-1 tasks, each placed at its best
// position), adding one more task never raises another task's marginal
// gain. Chains of single additions cover longer extensions.
func dmgHolds(p Problem) bool {
	var ok func(i int, path []int) bool
	ok = func(i int, path []int) bool {
		if len(path) >= p.Bundle-1 {
			return true
		}
		for k := range p.Tasks {
			if slices.Contains(path, k) {
				continue
			}
			n, _ := bestGain(p, i, path, k)
			next := slices.Insert(slices.Clone(path), n, k)
			for j := range p.Tasks {
				if j == k || slices.Contains(path, j) {
					continue
				}
				_, was := bestGain(p, i, path, j)
				if _, now := bestGain(p, i, next, j); now > was {
					return false
				}
			}
			if !ok(i, next) {
				return false
			}
		}
		return true
	}
	for i := range p.Agents {
		if !ok(i, nil) {
			return false
		}
	}
	return true
}

// conflict describes why paths are not a feasible assignment, or is "".
func conflict(p Problem, paths [][]int) string {
	owner := make([]int, p.Tasks)
	for j := range owner {
		owner[j] = -1
	}
	for i, path := range paths {
		if len(path) > p.Bundle {
			return "agent has more than Lt tasks"
		}
		for _, j := range path {
			if owner[j] >= 0 {
				return "a task is in two paths (or twice in one)"
			}
			owner[j] = i
		}
	}
	return ""
}

func equalPaths(a, b [][]int) bool {
	return slices.EqualFunc(a, b, func(x, y []int) bool { return slices.Equal(x, y) })
}

// The receiver's rules, one case per row of the paper's Table 1 (from
// memory), receiver i = 0, sender k = 1, third agents m = 2 and n = 3;
// "newer m" means the sender's information from m is more recent than the
// receiver's. Bids tie-break to the lower agent index.
func TestReceiveRuleTable(t *testing.T) {
	const i, k, m, n = 0, 1, 2, 3
	type act int
	const (
		leave act = iota
		update
		reset
	)
	for _, c := range []struct {
		name       string
		zk, zi     int
		yk, yi     float64
		newM, newN bool // the sender's information on m (n) is newer
		olderM     bool // the receiver's information on m is newer
		newK       bool // the sender heard from m after the receiver last heard from k
		want       act
	}{
		{name: "k says k, i says i, k bids more", zk: k, zi: i, yk: 2, yi: 1, want: update},
		{name: "k says k, i says i, k bids less", zk: k, zi: i, yk: 1, yi: 2, want: leave},
		{name: "k says k, i says i, tie to lower index", zk: k, zi: i, yk: 1, yi: 1, want: leave},
		{name: "k says k, i says k", zk: k, zi: k, yk: 1, yi: 2, want: update},
		{name: "k says k, i says m, newer m", zk: k, zi: m, yk: 1, yi: 2, newM: true, want: update},
		{name: "k says k, i says m, k bids more", zk: k, zi: m, yk: 2, yi: 1, want: update},
		{name: "k says k, i says m, neither", zk: k, zi: m, yk: 1, yi: 2, want: leave},
		{name: "k says k, i says none", zk: k, zi: none, yk: 1, want: update},
		{name: "k says i, i says i", zk: i, zi: i, yk: 1, yi: 2, want: leave},
		{name: "k says i, i says k", zk: i, zi: k, yk: 1, yi: 2, want: reset},
		{name: "k says i, i says m, newer m", zk: i, zi: m, yk: 1, yi: 2, newM: true, want: reset},
		{name: "k says i, i says m, not newer", zk: i, zi: m, yk: 1, yi: 2, want: leave},
		{name: "k says i, i says none", zk: i, zi: none, yk: 1, want: leave},
		{name: "k says m, i says i, newer m and more", zk: m, zi: i, yk: 2, yi: 1, newM: true, want: update},
		{name: "k says m, i says i, more but not newer", zk: m, zi: i, yk: 2, yi: 1, want: leave},
		{name: "k says m, i says i, newer but less", zk: m, zi: i, yk: 1, yi: 2, newM: true, want: leave},
		{name: "k says m, i says k, k heard m since", zk: m, zi: k, yk: 1, yi: 2, newK: true, want: update},
		{name: "k says m, i says k, otherwise", zk: m, zi: k, yk: 1, yi: 2, want: reset},
		{name: "k says m, i says m, newer m", zk: m, zi: m, yk: 1, yi: 2, newM: true, want: update},
		{name: "k says m, i says m, not newer", zk: m, zi: m, yk: 1, yi: 2, want: leave},
		{name: "k says m, i says n, newer m and n", zk: m, zi: n, yk: 1, yi: 2, newM: true, newN: true, want: update},
		{name: "k says m, i says n, newer m and more", zk: m, zi: n, yk: 2, yi: 1, newM: true, want: update},
		{name: "k says m, i says n, newer n, i newer on m", zk: m, zi: n, yk: 1, yi: 2, newN: true, olderM: true, want: reset},
		{name: "k says m, i says n, newer n, same age m", zk: m, zi: n, yk: 1, yi: 2, newN: true, want: leave},
		{name: "k says m, i says n, newer m only", zk: m, zi: n, yk: 1, yi: 2, newM: true, want: leave},
		{name: "k says m, i says n, nothing newer", zk: m, zi: n, yk: 2, yi: 1, want: leave},
		{name: "k says m, i says none, newer m", zk: m, zi: none, yk: 1, newM: true, want: update},
		{name: "k says m, i says none, not newer", zk: m, zi: none, yk: 1, want: leave},
		{name: "k says none, i says i", zk: none, zi: i, yi: 2, want: leave},
		{name: "k says none, i says k", zk: none, zi: k, yi: 2, want: update},
		{name: "k says none, i says m, newer m", zk: none, zi: m, yi: 2, newM: true, want: update},
		{name: "k says none, i says m, not newer", zk: none, zi: m, yi: 2, want: leave},
		{name: "k says none, i says none", zk: none, zi: none, want: leave},
	} {
		// Round 10; both last heard everyone in round 5 unless a flag
		// says otherwise.
		si := []int{10, 9, 5, 5}
		sk := []int{9, 10, 5, 5}
		if c.newM {
			sk[m] = 7
		}
		if c.newN {
			sk[n] = 7
		}
		if c.olderM {
			si[m] = 7
		}
		if c.newK {
			si[k], sk[m] = 6, 8 // i last heard k in round 6, k heard m in 8
		}
		a := &agent{id: i, y: []float64{c.yi}, z: []int{c.zi}, s: si}
		a.receive(k, &message{y: []float64{c.yk}, z: []int{c.zk}, s: sk})
		got := leave
		switch {
		case a.z[0] == c.zk && a.y[0] == c.yk && (c.zi != c.zk || c.yi != c.yk):
			got = update
		case a.z[0] == none && a.y[0] == 0 && c.zi != none:
			got = reset
		case a.z[0] != c.zi || a.y[0] != c.yi:
			t.Errorf("%s: ended with (%v, %d), neither of the three actions", c.name, a.y[0], a.z[0])
			continue
		}
		if got != c.want {
			t.Errorf("%s: action %d, want %d (0 leave, 1 update, 2 reset)", c.name, got, c.want)
		}
	}
}

// Source: found by a seeded search, traced by hand (see release). With
// the paper's reset of every later task read literally, agent 2 forgets
// that agent 0 won t0, bids for it again with t4 behind it, and its bid
// for t4 (on a bundle it never holds) makes agent 1 fill its bundle with
// t5 instead; once that bid is withdrawn agent 1 has no room for t4, and
// the auction ends at [[2 0] [3 5] [4 1]] against SGA's [[2 0] [3 4] [1 5]].
// The scores are DMG, so the paper's theorem says SGA's.
func TestOwnResetKeepsGreedy(t *testing.T) {
	type pt struct{ x, y int }
	agents := []pt{{4, 3}, {1, 3}, {3, 2}}
	tasks := []pt{{3, 4}, {3, 0}, {3, 3}, {1, 4}, {3, 4}, {1, 1}}
	d := func(a, b pt) float64 { return math.Abs(float64(a.x-b.x)) + math.Abs(float64(a.y-b.y)) }
	td := TimeDiscounted{
		Lambda:    0.6812629244131592,
		Service:   []float64{1, 1, 0, 2, 1, 2},
		FromAgent: func(i, j int) float64 { return d(agents[i], tasks[j]) },
		Between:   func(a, b int) float64 { return d(tasks[a], tasks[b]) },
	}
	p := Problem{Agents: 3, Tasks: 6, Bundle: 2, Score: td.Score}
	if !dmgHolds(p) {
		t.Fatal("the instance's scores are not DMG")
	}
	want := [][]int{{2, 0}, {3, 4}, {1, 5}}
	if got := sequentialGreedy(p); !equalPaths(got, want) {
		t.Fatalf("SGA %v, want %v", got, want)
	}
	res, err := Solve(p)
	if err != nil || !equalPaths(res.Paths, want) {
		t.Fatalf("CBBA %v (%v), want SGA's %v", res.Paths, err, want)
	}
}

// A power table changes no bit of a score: whole times are looked up,
// others (and those past the table) raised as before.
func TestPowTableSameBits(t *testing.T) {
	rng := rand.New(rand.NewPCG(4, 4))
	for range 2000 {
		lambda := 0.05 + 0.9*rng.Float64()
		n := 1 + rng.IntN(4)
		path := rng.Perm(6)[:n]
		times := []float64{0, 1, 2, 3, 7, 40, 0.5, 2.25}
		from := func(_, j int) float64 { return times[j%len(times)] }
		between := func(a, b int) float64 { return times[(a+b)%len(times)] }
		plain := TimeDiscounted{Lambda: lambda, FromAgent: from, Between: between}
		tabled := plain
		tabled.Powers = PowTable(lambda, 20)
		v1, v2 := make([]float64, n), make([]float64, n)
		plain.Score(0, path, v1)
		tabled.Score(0, path, v2)
		for i := range v1 {
			if math.Float64bits(v1[i]) != math.Float64bits(v2[i]) {
				t.Fatalf("lambda %v path %v: %v raised, %v tabled", lambda, path, v1, v2)
			}
		}
	}
}
