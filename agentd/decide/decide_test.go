package decide

import (
	"runtime"
	"slices"
	"testing"
	"time"

	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

func harborStart(t testing.TB, robots int) (*harbor.Model, model.State) {
	t.Helper()
	m, err := harbor.Default(robots)
	if err != nil {
		t.Fatal(err)
	}
	x := m.NewState()
	m.Start(x, model.NewRNG(9).Rand)
	return m, x
}

// Trade fact (common practice, from the method's description in
// arXiv:1910.00120): 4 robots with 5 moves each give 5^4 = 625 joint
// controls for all-at-once rollout and 4*5 = 20 for one-at-a-time.
func TestQFactorCounts(t *testing.T) {
	m, x := harborStart(t, 4)
	d := New(m, Config{Samples: 2, Horizon: 3})
	u := make([]int, 4)
	st, err := d.AllAtOnce(x, 1, 1, u)
	if err != nil {
		t.Fatal(err)
	}
	if st.QFactors != 625 {
		t.Errorf("all-at-once evaluated %d Q-factors, want 625", st.QFactors)
	}
	if st := d.OneAtATime(x, nil, 1, 1, u); st.QFactors != 20 {
		t.Errorf("one-at-a-time evaluated %d Q-factors, want 20", st.QFactors)
	}
}

// Controls that act alike share a simulation and give exactly the estimates
// and decisions simulating each would: boats at the corner dock, whose
// south and west moves are holds, decide as a model without aliases does.
func TestAliasesShareExactly(t *testing.T) {
	m, x := harborStart(t, 4)
	cfg := Config{Workers: 1, Samples: 8, Horizon: 10}
	a, b := New(m, cfg), New(noAlias{m}, cfg)
	known := []int{-1, -1, -1, -1}
	for r := range 4 {
		for seed := uint64(1); seed <= 20; seed++ {
			ca, sa := a.Turn(x, r, known, seed)
			ea := slices.Clone(a.full[:m.NumControls(x, r)])
			cb, sb := b.Turn(x, r, known, seed)
			if ca != cb || !slices.Equal(ea, b.est) {
				t.Fatalf("robot %d seed %d: control %d estimates %v shared, %d %v simulated", r, seed, ca, ea, cb, b.est)
			}
			if sa.Shared != 2 || sb.Shared != 0 || sa.QFactors != sb.QFactors || sa.Simulated >= sb.Simulated {
				t.Fatalf("robot %d: stats %+v shared, %+v simulated", r, sa, sb)
			}
		}
	}
}

// noAlias hides the model's Aliaser (and its JointBaser: an embedded
// interface carries only Model's methods).
type noAlias struct{ model.Model }

// Decisions depend on the seed only, not on the number of goroutines.
func TestDeterministicAcrossWorkers(t *testing.T) {
	m, x := harborStart(t, 5)
	a, b := New(m, Config{Workers: 1, Samples: 8}), New(m, Config{Workers: 3, Samples: 8})
	ua, ub := make([]int, 5), make([]int, 5)
	for round := 1; round <= 5; round++ {
		a.OneAtATime(x, []int{4, 2, 0, 1, 3}, 42, round, ua)
		b.OneAtATime(x, []int{4, 2, 0, 1, 3}, 42, round, ub)
		for i := range ua {
			if ua[i] != ub[i] {
				t.Fatalf("round %d: 1 worker %v, 3 workers %v", round, ua, ub)
			}
		}
	}
	ea, _ := a.QFactors(x, [][]int{{0, 1, 2, 3, 4}}, 7)
	va := ea[0]
	eb, _ := b.QFactors(x, [][]int{{0, 1, 2, 3, 4}}, 7)
	if va != eb[0] {
		t.Fatalf("estimates differ: %v vs %v", va, eb[0])
	}
}

// Common random numbers: a candidate's estimate is the same each time, and
// two candidates that are the same joint control get the same estimate.
func TestCommonRandomNumbers(t *testing.T) {
	m, x := harborStart(t, 2)
	d := New(m, Config{Samples: 16})
	est, _ := d.QFactors(x, [][]int{{1, 3}, {2, 2}, {1, 3}}, 5)
	if est[0] != est[2] {
		t.Fatalf("same control, different estimates: %v %v", est[0], est[2])
	}
}

// On a tie the robot keeps its base control: with no slicks left every
// control costs 0, and the base policy holds.
func TestTieKeepsBase(t *testing.T) {
	m, x := harborStart(t, 2)
	s := x.(*harbor.State)
	for i := range s.Slicks {
		s.Slicks[i] = -1
	}
	s.Left = 0
	d := New(m, Config{Samples: 2})
	u := []int{-1, -1}
	if c, _ := d.Turn(x, 0, u, 1); c != harbor.Hold {
		t.Fatalf("tie went to %d, want hold", c)
	}
}

// A Turn allocates nothing once its buffers exist (one worker; the
// goroutine fan-out allocates a little per decision, never per step).
func TestTurnAllocs(t *testing.T) {
	m, x := harborStart(t, 4)
	d := New(m, Config{Workers: 1, Samples: 8})
	known := []int{-1, -1, -1, -1}
	d.Turn(x, 1, known, 1)
	if a := testing.AllocsPerRun(20, func() { d.Turn(x, 1, known, 1) }); a != 0 {
		t.Fatalf("Turn allocates %.1f times", a)
	}
	um, err := upkeep.Default(4)
	if err != nil {
		t.Fatal(err)
	}
	ux := um.NewState()
	um.Start(ux, nil)
	ud := New(um, Config{Workers: 1, Samples: 8})
	ud.Turn(ux, 2, known, 1)
	if a := testing.AllocsPerRun(20, func() { ud.Turn(ux, 2, known, 1) }); a != 0 {
		t.Fatalf("upkeep Turn allocates %.1f times", a)
	}
}

func benchTurn(b *testing.B, m model.Model, x model.State) { benchTurnWorkers(b, m, x, 1) }

func benchTurnWorkers(b *testing.B, m model.Model, x model.State, workers int) {
	d := New(m, Config{Workers: workers, Samples: 16, Horizon: 20})
	known := make([]int, m.Robots())
	for i := range known {
		known[i] = -1
	}
	d.Turn(x, 0, known, 1)
	b.ReportAllocs()
	var sim int64
	for b.Loop() {
		_, st := d.Turn(x, 0, known, 1)
		sim += st.Simulated
	}
	b.ReportMetric(float64(sim*int64(m.Robots()))/b.Elapsed().Seconds(), "robot-steps/s")
	b.ReportMetric(float64(sim)/float64(b.N), "steps/op")
}

// Q-factor throughput per core: simulated robot-steps per second inside one
// robot's turn (5 candidates x 16 samples x up to 21 steps), one worker.
func BenchmarkTurnHarbor(b *testing.B) {
	m, x := harborStart(b, 4)
	benchTurn(b, m, x)
}

// The same turn on two workers: against BenchmarkTurnHarbor, how far two
// cores go (workers share nothing they write).
func BenchmarkTurnHarbor2Workers(b *testing.B) {
	m, x := harborStart(b, 4)
	benchTurnWorkers(b, m, x, 2)
}

func BenchmarkTurnUpkeep(b *testing.B) {
	m, err := upkeep.Default(4)
	if err != nil {
		b.Fatal(err)
	}
	x := m.NewState()
	m.Start(x, nil)
	benchTurn(b, m, x)
}

// A whole one-at-a-time decision for a fleet of 32 boats (every robot's
// turn, in order) with the default effort on two workers: the time a
// round's rollout takes when one machine decides for all.
func BenchmarkDecision32Harbor(b *testing.B) {
	m, x := harborStart(b, 32)
	cfg := DefaultConfig()
	cfg.Workers = 2
	d := New(m, cfg)
	out := make([]int, m.Robots())
	d.OneAtATime(x, nil, 1, 1, out)
	b.ReportAllocs()
	var sim int64
	for b.Loop() {
		st := d.OneAtATime(x, nil, 1, 1, out)
		sim += st.Simulated
	}
	b.ReportMetric(float64(b.Elapsed().Microseconds())/1000/float64(b.N), "ms/decision")
	b.ReportMetric(float64(sim*int64(m.Robots()))/b.Elapsed().Seconds(), "robot-steps/s")
}

// A Decider's extra workers live between decisions (waking a goroutine on
// an idle core costs about a turn) and stop once the Decider is dropped:
// 20 Deciders made and dropped leave no goroutines behind.
func TestWorkersStopWithDecider(t *testing.T) {
	m, x := harborStart(t, 4)
	before := runtime.NumGoroutine()
	for seed := range uint64(20) {
		d := New(m, Config{Workers: 3, Samples: 4, Horizon: 3})
		d.Turn(x, 0, []int{-1, -1, -1, -1}, seed)
	}
	deadline := time.Now().Add(10 * time.Second)
	for runtime.NumGoroutine() > before {
		if time.Now().After(deadline) {
			t.Fatalf("%d goroutines, %d before the Deciders", runtime.NumGoroutine(), before)
		}
		runtime.GC()
		time.Sleep(10 * time.Millisecond)
	}
}

// The upkeep turn on two workers, against BenchmarkTurnUpkeep.
func BenchmarkTurnUpkeep2Workers(b *testing.B) {
	m, err := upkeep.Default(4)
	if err != nil {
		b.Fatal(err)
	}
	x := m.NewState()
	m.Start(x, nil)
	benchTurnWorkers(b, m, x, 2)
}
