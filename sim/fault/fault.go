// Package fault is the drills' message layer: it sits between the
// daemons' round protocol and the bus and decides, for every delivery from
// one endpoint to another, whether it is lost, how late it arrives and
// whether it arrives twice. The virtual-time fleet (sim/vfleet) asks it for
// every in-memory delivery; real daemons started by a drill wrap their bus
// with it (Bus); membership gossip goes through it too. It is pure: the
// caller says which round it is and keeps the time.
//
// Every fault is seeded and scheduled by round. Each directed link (from,
// to) draws from its own random stream, so what one link suffers does not
// depend on how much traffic the others carried, and two drills with the
// same seed see the same faults on the same messages.
//
// Nothing in the production daemons imports this package: only the drill
// harness (sim) can switch it on.
package fault

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"time"
)

// Coordinator is the coordinator's endpoint number; robots are 0..m-1.
const Coordinator = -1

// Kind names one kind of fault.
type Kind string

// Fault kinds. The first group acts on messages (this package); the
// others are carried out by the drill harness on processes and
// connections.
const (
	Loss      Kind = "loss"      // independent loss with probability P
	Burst     Kind = "burst"     // Gilbert-Elliott two-state loss
	Delay     Kind = "delay"     // Fixed plus a draw from Jitter's distribution
	Duplicate Kind = "duplicate" // with probability P a second copy, Delay later
	Reorder   Kind = "reorder"   // with probability P held back by a Delay draw
	Partition Kind = "partition" // Groups cannot hear each other
	Slow      Kind = "slow"      // the robots' turns take Slow longer

	KillRobot       Kind = "kill-robot"       // SIGKILL the robots' daemons, restart after Down
	KillCoordinator Kind = "kill-coordinator" // SIGKILL the coordinator, restart after Down
	KillNATS        Kind = "kill-nats"        // stop the NATS server, restart after Down
	Stall           Kind = "stall"            // the robots' NATS connections stall for Down
	Reset           Kind = "reset"            // the robots' NATS connections are reset
)

// Kinds lists every kind, message faults first.
var Kinds = []Kind{Loss, Burst, Delay, Duplicate, Reorder, Partition, Slow, KillRobot, KillCoordinator, KillNATS, Stall, Reset}

// Process reports whether the kind needs real processes.
func (k Kind) Process() bool {
	switch k {
	case KillRobot, KillCoordinator, KillNATS, Stall, Reset:
		return true
	}
	return false
}

// Distributions of a delay's random part.
const (
	Uniform     = "uniform"     // [0, 2·Jitter): mean Jitter
	Exponential = "exponential" // mean Jitter
	Normal      = "normal"      // |N(0, Jitter²)|
	Pareto      = "pareto"      // shape 2, mean Jitter: rare long waits
)

// Dists lists the distribution names.
var Dists = []string{Uniform, Exponential, Normal, Pareto}

// Jitter is a delay: Fixed plus a random part of mean (or scale) Mean
// drawn from Dist.
type Jitter struct {
	Fixed time.Duration
	Mean  time.Duration
	Dist  string
}

// GE is a Gilbert-Elliott channel (Gilbert 1960; Elliott 1963): a link is
// Good or Bad, moves Good→Bad with probability P and Bad→Good with
// probability R before each message, and loses a message with probability
// LossGood or LossBad in each state. Its stationary Bad probability is
// P/(P+R), a Bad spell lasts 1/R messages on average, and its long-run
// loss rate is (R·LossGood + P·LossBad)/(P+R).
type GE struct {
	P, R              float64
	LossGood, LossBad float64
}

// Bursty is the Gilbert channel (LossGood 0, LossBad 1) with long-run loss
// rate loss and mean burst length meanBurst messages.
func Bursty(loss, meanBurst float64) GE {
	if loss <= 0 || meanBurst < 1 {
		return GE{R: 1, LossBad: 1}
	}
	r := 1 / meanBurst
	return GE{P: r * loss / (1 - loss), R: r, LossBad: 1}
}

// Rate is the long-run loss rate.
func (g GE) Rate() float64 {
	if g.P+g.R == 0 {
		return g.LossGood
	}
	return (g.R*g.LossGood + g.P*g.LossBad) / (g.P + g.R)
}

// MeanBad is the mean Bad spell in messages (1/R).
func (g GE) MeanBad() float64 { return 1 / g.R }

// Spec is one scheduled fault.
type Spec struct {
	Kind Kind
	// Rounds From..Until inclusive (Until 0: to the end).
	From, Until int
	// Robots whose links it touches (either end; nil: every link). For
	// process faults and Slow: the robots it acts on.
	Robots []int
	// Links are directed (from, to) pairs it touches instead, when set.
	Links [][2]int
	P     float64 // Loss, Duplicate, Reorder
	GE    GE      // Burst
	Delay Jitter  // Delay; Duplicate's and Reorder's extra delay
	// Groups of endpoints (Coordinator included) that cannot hear each
	// other; an endpoint in no group hears everyone.
	Groups [][]int
	Slow   time.Duration // Slow: extra time per turn
	Down   time.Duration // process faults: time before the restart; Stall: its length
}

// Describe is the spec in a line, for reports.
func (s Spec) Describe() string {
	var b strings.Builder
	b.WriteString(string(s.Kind))
	switch s.Kind {
	case Loss, Duplicate, Reorder:
		fmt.Fprintf(&b, " p=%g", s.P)
	case Burst:
		fmt.Fprintf(&b, " rate=%.3g mean-burst=%.3g", s.GE.Rate(), s.GE.MeanBad())
	case Partition:
		fmt.Fprintf(&b, " groups=%v", s.Groups)
	case Slow:
		fmt.Fprintf(&b, " +%s", s.Slow)
	}
	if s.Kind == Delay || s.Kind == Duplicate || s.Kind == Reorder {
		fmt.Fprintf(&b, " delay=%s+%s(%s)", s.Delay.Fixed, s.Delay.Mean, s.Delay.Dist)
	}
	if s.Down > 0 {
		fmt.Fprintf(&b, " for %s", s.Down)
	}
	if len(s.Robots) > 0 {
		fmt.Fprintf(&b, " robots=%v", s.Robots)
	}
	if len(s.Links) > 0 {
		fmt.Fprintf(&b, " links=%v", s.Links)
	}
	if s.Until > 0 {
		fmt.Fprintf(&b, " rounds %d-%d", max(s.From, 1), s.Until)
	} else if s.From > 1 {
		fmt.Fprintf(&b, " from round %d", s.From)
	}
	return b.String()
}

// Check validates a spec for a fleet of robots robots and rounds rounds
// (0: unknown); the error names the field.
func (s Spec) Check(robots, rounds int) error {
	if !slices.Contains(Kinds, s.Kind) {
		return fmt.Errorf("unknown fault %q (known: %s)", s.Kind, KindList())
	}
	prob := func(name string, p float64) error {
		if !(p >= 0 && p <= 1) {
			return fmt.Errorf("%s %g: a probability must be in [0,1]", name, p)
		}
		return nil
	}
	switch {
	case s.From < 0 || s.Until < 0:
		return fmt.Errorf("rounds %d-%d: rounds count from 1", s.From, s.Until)
	case s.Until > 0 && s.Until < s.From:
		return fmt.Errorf("rounds %d-%d: the window ends before it begins", s.From, s.Until)
	case rounds > 0 && s.From > rounds:
		return fmt.Errorf("from round %d: past the drill's last round %d", s.From, rounds)
	case rounds > 0 && s.Until > rounds:
		return fmt.Errorf("until round %d: past the drill's last round %d", s.Until, rounds)
	}
	for _, r := range s.Robots {
		if r < 0 || r >= robots {
			return fmt.Errorf("robot %d: the fleet has robots 0..%d", r, robots-1)
		}
	}
	for _, l := range s.Links {
		for _, e := range l {
			if e < Coordinator || e >= robots {
				return fmt.Errorf("link %v: endpoint %d is neither the coordinator nor a robot 0..%d", l, e, robots-1)
			}
		}
	}
	switch s.Kind {
	case Loss, Duplicate, Reorder:
		if err := prob("p", s.P); err != nil {
			return err
		}
	case Burst:
		for _, p := range []struct {
			n string
			v float64
		}{{"p (good to bad)", s.GE.P}, {"r (bad to good)", s.GE.R}, {"loss in good", s.GE.LossGood}, {"loss in bad", s.GE.LossBad}} {
			if err := prob(p.n, p.v); err != nil {
				return err
			}
		}
		if s.GE.R == 0 {
			return errors.New("r (bad to good) 0: the channel would stay bad for ever")
		}
	case Partition:
		if len(s.Groups) < 2 {
			return fmt.Errorf("groups %v: a partition needs at least two groups", s.Groups)
		}
		seen := map[int]bool{}
		for _, g := range s.Groups {
			for _, e := range g {
				if e < Coordinator || e >= robots {
					return fmt.Errorf("groups: %d is neither the coordinator nor a robot 0..%d", e, robots-1)
				}
				if seen[e] {
					return fmt.Errorf("groups: %s is in two groups", EndpointName(e))
				}
				seen[e] = true
			}
		}
	case Slow:
		if s.Slow <= 0 || s.Slow > time.Hour {
			return fmt.Errorf("slow %s: want a positive extra time per turn up to 1h", s.Slow)
		}
	}
	if s.Kind == Delay || s.Kind == Duplicate || s.Kind == Reorder {
		d := s.Delay
		if d.Fixed < 0 || d.Mean < 0 || d.Fixed > time.Hour || d.Mean > time.Hour {
			return fmt.Errorf("delay %s + %s: want 0 to 1h each", d.Fixed, d.Mean)
		}
		if d.Mean > 0 && !slices.Contains(Dists, d.Dist) {
			return fmt.Errorf("distribution %q: want one of %s", d.Dist, strings.Join(Dists, ", "))
		}
		if s.Kind == Delay && d.Fixed == 0 && d.Mean == 0 {
			return errors.New("delay: give a fixed part, a random part or both")
		}
	}
	if s.Kind.Process() {
		if s.Down < 0 || s.Down > 10*time.Minute {
			return fmt.Errorf("down %s: want 0 to 10m", s.Down)
		}
		if s.Kind == Stall && s.Down == 0 {
			return errors.New("stall: give its length (down)")
		}
		if s.Until > 0 && s.Until != s.From {
			return fmt.Errorf("rounds %d-%d: %s happens once, at one round (give only from)", s.From, s.Until, s.Kind)
		}
	}
	return nil
}

// KindList is every kind, comma-separated, for messages.
func KindList() string {
	var s []string
	for _, k := range Kinds {
		s = append(s, string(k))
	}
	return strings.Join(s, ", ")
}

// EndpointName names an endpoint in messages.
func EndpointName(e int) string {
	if e == Coordinator {
		return "the coordinator"
	}
	return fmt.Sprintf("robot %d", e)
}

func (s Spec) active(round int) bool {
	return round >= s.From && (s.Until == 0 || round <= s.Until)
}

// touches reports whether the spec acts on the link from→to.
func (s Spec) touches(from, to int) bool {
	if len(s.Links) > 0 {
		return slices.Contains(s.Links, [2]int{from, to})
	}
	if len(s.Robots) == 0 {
		return true
	}
	return slices.Contains(s.Robots, from) || slices.Contains(s.Robots, to)
}

// Layer decides deliveries. Not safe for concurrent use.
type Layer struct {
	specs []Spec
	seed  uint64
	links map[[2]int]*link
	stats Stats
}

type link struct {
	rng *rand.Rand
	bad []bool // per spec: the Gilbert-Elliott state
}

// Stats counts what the layer did.
type Stats struct {
	Delivered, Dropped, Duplicated, Delayed, Reordered uint64
	// Partitioned counts the drops that were a partition's.
	Partitioned uint64
}

// New builds a layer for specs (each must pass Check). Process faults are
// kept for the harness and ignored here.
func New(seed uint64, specs []Spec) *Layer {
	return &Layer{specs: slices.Clone(specs), seed: seed, links: map[[2]int]*link{}}
}

// Specs is the layer's schedule.
func (l *Layer) Specs() []Spec { return l.specs }

// Stats is what the layer did so far.
func (l *Layer) Stats() Stats { return l.stats }

// Verdict is a delivery's fate: Copies 0 (lost), 1 or 2, each after its
// delay.
type Verdict struct {
	Copies int
	After  [2]time.Duration
}

func (l *Layer) link(from, to int) *link {
	k := [2]int{from, to}
	if lk := l.links[k]; lk != nil {
		return lk
	}
	// A stream per directed link: splitmix-style mixing of the endpoints
	// into the seed.
	s := l.seed ^ uint64(int64(from)+2)*0x9e3779b97f4a7c15 ^ uint64(int64(to)+2)*0xbf58476d1ce4e5b9
	lk := &link{rng: rand.New(rand.NewPCG(s, 0x6661756c74)), bad: make([]bool, len(l.specs))}
	l.links[k] = lk
	return lk
}

// Deliver decides one delivery from→to during round. Each active spec
// draws in schedule order, and a link's draws do not depend on other
// links' traffic.
func (l *Layer) Deliver(round, from, to int) Verdict {
	v := Verdict{Copies: 1}
	if len(l.specs) == 0 {
		l.stats.Delivered++
		return v
	}
	lk := l.link(from, to)
	for i, s := range l.specs {
		if !s.active(round) || s.Kind.Process() || s.Kind == Slow {
			continue
		}
		if s.Kind == Partition {
			if apart(s.Groups, from, to) {
				l.stats.Dropped++
				l.stats.Partitioned++
				return Verdict{}
			}
			continue
		}
		if !s.touches(from, to) {
			continue
		}
		switch s.Kind {
		case Loss:
			if lk.rng.Float64() < s.P {
				l.stats.Dropped++
				return Verdict{}
			}
		case Burst:
			lose := lk.step(i, s.GE)
			if lose {
				l.stats.Dropped++
				return Verdict{}
			}
		case Delay:
			d := s.Delay.draw(lk.rng)
			v.After[0] += d
			v.After[1] += d
			l.stats.Delayed++
		case Duplicate:
			if lk.rng.Float64() < s.P && v.Copies == 1 {
				v.Copies = 2
				v.After[1] = v.After[0] + s.Delay.draw(lk.rng)
				l.stats.Duplicated++
			}
		case Reorder:
			if lk.rng.Float64() < s.P {
				d := s.Delay.draw(lk.rng)
				v.After[0] += d
				v.After[1] += d
				l.stats.Reordered++
			}
		}
	}
	l.stats.Delivered++
	return v
}

// step moves link spec i's Gilbert-Elliott state and draws a loss.
func (lk *link) step(i int, g GE) bool {
	u := lk.rng.Float64()
	if lk.bad[i] {
		lk.bad[i] = u >= g.R
	} else {
		lk.bad[i] = u < g.P
	}
	loss := g.LossGood
	if lk.bad[i] {
		loss = g.LossBad
	}
	return loss > 0 && lk.rng.Float64() < loss
}

func apart(groups [][]int, a, b int) bool {
	ga, gb := -1, -1
	for i, g := range groups {
		if slices.Contains(g, a) {
			ga = i
		}
		if slices.Contains(g, b) {
			gb = i
		}
	}
	return ga >= 0 && gb >= 0 && ga != gb
}

// SlowBy is how much longer robot's turns take in round.
func (l *Layer) SlowBy(round, robot int) time.Duration {
	var d time.Duration
	for _, s := range l.specs {
		if s.Kind == Slow && s.active(round) && (len(s.Robots) == 0 || slices.Contains(s.Robots, robot)) {
			d += s.Slow
		}
	}
	return d
}

// draw is one delay: Fixed plus the random part.
func (j Jitter) draw(rng *rand.Rand) time.Duration {
	if j.Mean <= 0 {
		return j.Fixed
	}
	m := float64(j.Mean)
	var x float64
	switch j.Dist {
	case Exponential:
		x = rng.ExpFloat64() * m
	case Normal:
		x = math.Abs(rng.NormFloat64()) * m
	case Pareto:
		// Shape 2, scale m/2: mean m, infinite variance.
		x = m / 2 / math.Sqrt(1-rng.Float64())
	default: // Uniform
		x = rng.Float64() * 2 * m
	}
	x = min(x, float64(time.Hour))
	return j.Fixed + time.Duration(x)
}
