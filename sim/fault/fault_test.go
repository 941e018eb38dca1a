package fault

import (
	"math"
	"strings"
	"testing"
	"time"
)

// The Gilbert-Elliott channel's long-run loss rate and mean burst length
// match the closed forms: stationary Bad probability p/(p+r), mean Bad
// sojourn 1/r messages (Gilbert, "Capacity of a burst-noise channel", Bell
// System Technical Journal 39, 1960; Elliott, "Estimates of error rates for
// codes on burst-noise channels", BSTJ 42, 1963). With LossGood 0 and
// LossBad 1 a loss burst is a Bad spell. The measured values must lie
// within their 99% confidence intervals (batch means for the rate, whose
// samples are correlated; independent spells for the burst length).
func TestGilbertElliottClosedForms(t *testing.T) {
	for _, g := range []GE{Bursty(0.2, 5), {P: 0.02, R: 0.1, LossBad: 1}, Bursty(0.5, 2)} {
		l := New(7, []Spec{{Kind: Burst, GE: g}})
		const batches, per = 200, 2000
		var rates []float64
		var bursts []float64
		run := 0
		for range batches {
			lost := 0
			for range per {
				if l.Deliver(1, 0, 1).Copies == 0 {
					lost++
					run++
				} else if run > 0 {
					bursts = append(bursts, float64(run))
					run = 0
				}
			}
			rates = append(rates, float64(lost)/per)
		}
		rate, rateSE := meanSE(rates)
		burst, burstSE := meanSE(bursts)
		wantRate, wantBurst := g.P/(g.P+g.R), 1/g.R
		if math.Abs(rate-wantRate) > 2.576*rateSE {
			t.Errorf("%+v: loss rate %.4f ±%.4f, closed form %.4f", g, rate, 2.576*rateSE, wantRate)
		}
		if math.Abs(burst-wantBurst) > 2.576*burstSE {
			t.Errorf("%+v: mean burst %.3f ±%.3f, closed form %.3f", g, burst, 2.576*burstSE, wantBurst)
		}
		if math.Abs(g.Rate()-wantRate) > 1e-12 || math.Abs(g.MeanBad()-wantBurst) > 1e-12 {
			t.Errorf("%+v: Rate %g MeanBad %g", g, g.Rate(), g.MeanBad())
		}
	}
}

func meanSE(x []float64) (mean, se float64) {
	for _, v := range x {
		mean += v
	}
	mean /= float64(len(x))
	var ss float64
	for _, v := range x {
		ss += (v - mean) * (v - mean)
	}
	return mean, math.Sqrt(ss / float64(len(x)-1) / float64(len(x)))
}

// Independent loss drops its share; each link's stream is its own, so a
// link's fate does not depend on another link's traffic.
func TestLossPerLinkStreams(t *testing.T) {
	specs := []Spec{{Kind: Loss, P: 0.3}}
	a, b := New(3, specs), New(3, specs)
	var fa, fb []int
	lost := 0
	for i := range 20000 {
		fa = append(fa, a.Deliver(1, 0, 1).Copies)
		if i%3 == 0 {
			b.Deliver(1, 2, 1) // traffic on another link in between
		}
		fb = append(fb, b.Deliver(1, 0, 1).Copies)
		if fa[i] == 0 {
			lost++
		}
	}
	for i := range fa {
		if fa[i] != fb[i] {
			t.Fatalf("delivery %d on link 0→1 changed with traffic on 2→1", i)
		}
	}
	if got := float64(lost) / 20000; math.Abs(got-0.3) > 0.015 {
		t.Fatalf("lost %.3f, want 0.3", got)
	}
	if s := a.Stats(); s.Dropped != uint64(lost) || s.Delivered != uint64(20000-lost) {
		t.Fatalf("stats %+v, lost %d", s, lost)
	}
}

// Schedules: a fault acts only inside its rounds and on its robots'
// links; partitions cut exactly the links between groups.
func TestScheduleAndScope(t *testing.T) {
	l := New(1, []Spec{
		{Kind: Loss, P: 1, From: 3, Until: 4, Robots: []int{2}},
		{Kind: Partition, From: 10, Until: 10, Groups: [][]int{{0, 1, Coordinator}, {2, 3}}},
		{Kind: Delay, Links: [][2]int{{0, 1}}, Delay: Jitter{Fixed: 40 * time.Millisecond}},
	})
	cases := []struct {
		round, from, to, copies int
		after                   time.Duration
	}{
		{2, 2, 0, 1, 0}, {3, 2, 0, 0, 0}, {4, 0, 2, 0, 0}, {5, 2, 0, 1, 0}, {3, 0, 3, 1, 0},
		{10, 0, 2, 0, 0}, {10, Coordinator, 3, 0, 0}, {10, Coordinator, 1, 1, 0}, {10, 3, 2, 1, 0}, {11, 0, 2, 1, 0},
		{1, 0, 1, 1, 40 * time.Millisecond}, {1, 1, 0, 1, 0},
	}
	for _, c := range cases {
		v := l.Deliver(c.round, c.from, c.to)
		if v.Copies != c.copies || (v.Copies > 0 && v.After[0] != c.after) {
			t.Errorf("round %d %d→%d: %+v, want %d copies after %s", c.round, c.from, c.to, v, c.copies, c.after)
		}
	}
	if s := l.Stats(); s.Partitioned != 2 {
		t.Errorf("partitioned %d, want 2", s.Partitioned)
	}
}

// Delay distributions have the documented means (Pareto: shape 2, scale
// mean/2, whose median is scale·√2).
func TestDelayDistributions(t *testing.T) {
	const mean = 10 * time.Millisecond
	for _, d := range Dists {
		l := New(5, []Spec{{Kind: Delay, Delay: Jitter{Fixed: time.Millisecond, Mean: mean, Dist: d}}})
		var xs []float64
		for range 40000 {
			v := l.Deliver(1, 0, 1)
			if v.After[0] < time.Millisecond {
				t.Fatalf("%s: delay %s below the fixed part", d, v.After[0])
			}
			xs = append(xs, float64(v.After[0]-time.Millisecond))
		}
		m, se := meanSE(xs)
		want := float64(mean)
		switch d {
		case Normal:
			want *= math.Sqrt(2 / math.Pi) // mean of |N(0,σ²)|
		case Pareto:
			continue // infinite variance: the mean converges too slowly to test
		}
		if math.Abs(m-want) > 4*se {
			t.Errorf("%s: mean %.0f ns, want %.0f (±%.0f)", d, m, want, 4*se)
		}
	}
}

func TestDuplicateAndReorder(t *testing.T) {
	l := New(2, []Spec{{Kind: Duplicate, P: 1, Delay: Jitter{Fixed: 5 * time.Millisecond}},
		{Kind: Reorder, P: 1, Delay: Jitter{Fixed: 7 * time.Millisecond}}})
	v := l.Deliver(1, 0, 1)
	if v.Copies != 2 || v.After != [2]time.Duration{7 * time.Millisecond, 12 * time.Millisecond} {
		t.Fatalf("%+v", v)
	}
	if s := l.Stats(); s.Duplicated != 1 || s.Reordered != 1 {
		t.Fatalf("%+v", s)
	}
}

func TestSlowBy(t *testing.T) {
	l := New(1, []Spec{{Kind: Slow, Slow: time.Second, Robots: []int{1}, From: 2}})
	if l.SlowBy(1, 1) != 0 || l.SlowBy(2, 1) != time.Second || l.SlowBy(2, 0) != 0 {
		t.Fatal("slow applied outside its robot or rounds")
	}
}

func TestCheckNamesTheField(t *testing.T) {
	for _, c := range []struct {
		s    Spec
		want string
	}{
		{Spec{Kind: "fog"}, `unknown fault "fog"`},
		{Spec{Kind: Loss, P: 1.5}, "p 1.5"},
		{Spec{Kind: Burst, GE: GE{P: 0.1, R: 0}}, "stay bad"},
		{Spec{Kind: Burst, GE: GE{P: -0.1, R: 1}}, "good to bad"},
		{Spec{Kind: Loss, P: 0.1, From: 5, Until: 300}, "until round 300"},
		{Spec{Kind: Loss, P: 0.1, From: 201}, "from round 201"},
		{Spec{Kind: Loss, P: 0.1, From: 9, Until: 3}, "ends before"},
		{Spec{Kind: Loss, P: 0.1, Robots: []int{6}}, "robot 6"},
		{Spec{Kind: Partition, Groups: [][]int{{0, 1}}}, "two groups"},
		{Spec{Kind: Partition, Groups: [][]int{{0, 1}, {1, 2}}}, "robot 1 is in two groups"},
		{Spec{Kind: Delay}, "give a fixed part"},
		{Spec{Kind: Delay, Delay: Jitter{Mean: time.Millisecond, Dist: "cauchy"}}, `distribution "cauchy"`},
		{Spec{Kind: Stall}, "give its length"},
		{Spec{Kind: KillRobot, From: 3, Until: 5}, "happens once"},
	} {
		err := c.s.Check(6, 200)
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%+v: %v, want %q", c.s, err, c.want)
		}
	}
	if err := (Spec{Kind: Burst, GE: Bursty(0.2, 4), From: 1, Until: 200}).Check(6, 200); err != nil {
		t.Errorf("a good spec refused: %v", err)
	}
}
