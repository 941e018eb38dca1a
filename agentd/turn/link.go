package turn

import (
	"math"
	"slices"
	"time"
)

// LinkMonitor defaults.
const (
	DefaultAlpha    = 0.2
	DefaultWindow   = 64
	DefaultQuantile = 0.95
)

// LinkMonitor tracks one-way hop latencies: an EWMA for the typical hop and
// a high quantile over the last Window samples for the bad ones, because a
// turn waits on its slowest predecessor, not the average one. It is pure
// (the caller measures) and not safe for concurrent use. The zero value
// uses the defaults.
type LinkMonitor struct {
	alpha, q float64
	ring     []time.Duration // last samples, ring buffer
	next     int             // ring slot the next sample goes to
	n        int             // samples in the ring
	ewma     float64
	scratch  []time.Duration
}

// NewLinkMonitor returns a monitor with EWMA weight alpha in (0,1], a window
// of the last window samples and the given quantile in (0,1]. Values out of
// range take the defaults (0.2, 64, 0.95).
func NewLinkMonitor(alpha float64, window int, quantile float64) *LinkMonitor {
	l := &LinkMonitor{}
	l.setup(alpha, window, quantile)
	return l
}

func (l *LinkMonitor) setup(alpha float64, window int, quantile float64) {
	if !(alpha > 0 && alpha <= 1) {
		alpha = DefaultAlpha
	}
	if window <= 0 {
		window = DefaultWindow
	}
	if !(quantile > 0 && quantile <= 1) {
		quantile = DefaultQuantile
	}
	l.alpha, l.q = alpha, quantile
	l.ring = make([]time.Duration, window)
}

// Observe adds one hop latency. Negative values (clock steps) count as 0.
func (l *LinkMonitor) Observe(d time.Duration) {
	if l.ring == nil {
		l.setup(0, 0, 0)
	}
	d = max(d, 0)
	if l.n == 0 {
		l.ewma = float64(d) // no history to blend with
	} else {
		l.ewma = l.alpha*float64(d) + (1-l.alpha)*l.ewma
	}
	l.ring[l.next] = d
	l.next = (l.next + 1) % len(l.ring)
	if l.n < len(l.ring) {
		l.n++
	}
}

// EWMA is the smoothed hop latency (0 before any sample).
func (l *LinkMonitor) EWMA() time.Duration { return time.Duration(math.Round(l.ewma)) }

// Samples is how many samples the window holds now.
func (l *LinkMonitor) Samples() int { return l.n }

// Quantile is the nearest-rank quantile of the window: the smallest sample
// with at least that share of the window at or below it (0 when empty).
func (l *LinkMonitor) Quantile() time.Duration {
	if l.n == 0 {
		return 0
	}
	l.scratch = append(l.scratch[:0], l.ring[:l.n]...)
	slices.Sort(l.scratch)
	i := int(math.Ceil(l.q*float64(l.n))) - 1
	return l.scratch[min(max(i, 0), l.n-1)]
}

// Suggest picks the mode for the next rounds. A sequential round costs
// about robots x (hop + compute); if that, taken at the high quantile hop,
// does not fit in the round period, waiting on predecessors would overrun
// the period, so no turn should wait: Parallel. Otherwise Hybrid, which
// waits when links are fine and guesses when a hop is lost. Sequential is
// never suggested: one lost message would stall the round. A period of 0
// (no fixed period) means nothing to overrun: Hybrid.
func (l *LinkMonitor) Suggest(robots int, compute, period time.Duration) Mode {
	if period <= 0 || robots <= 0 {
		return Hybrid
	}
	per := l.Quantile() + max(compute, 0)
	if per < 0 {
		return Parallel // the sum overflowed: far slower than any period
	}
	// robots*per > period, written so huge inputs cannot overflow.
	if per > 0 && int64(robots) > int64(period/per) {
		return Parallel
	}
	return Hybrid
}
