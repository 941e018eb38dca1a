package upkeep

import (
	"fmt"
	"math"

	"baton/sim/model"
)

// The fleet's decision state is the belief, and the belief is what Advance
// and Observe already compute; the world only has to say where each robot
// is and what level it found. Advance (model.go) is the prediction half.
var _ model.Fleet = (*Model)(nil)

// beliefTolerance is how far from 1 a site's belief may sum in a snapshot.
const beliefTolerance = 1e-9

// pointLevel is the level a belief is a point mass at: one entry exactly 1,
// the rest exactly 0 (what point writes); ok is false for any other belief.
func pointLevel(b []float64) (level int, ok bool) {
	level = -1
	for l, q := range b {
		switch {
		case q == 0:
		case q == 1 && level < 0:
			level = l
		default:
			return -1, false
		}
	}
	return level, level >= 0
}

// Sense is what robot r sees in s after a step: with "observe: own" the
// level of its own site, with "observe: all" the level of every site.
// Step has just collapsed every observed site to a point mass, so each level
// is reported with certainty; a site whose belief is not a point mass (a
// state Step did not produce) is left out rather than guessed.
func (m *Model) Sense(s model.State, r int, dst []model.Sighting) []model.Sighting {
	st := s.(*State)
	if m.observeAll {
		for site := range m.n {
			dst = m.senseSite(st, site, dst)
		}
		return dst
	}
	return m.senseSite(st, st.pos[r], dst)
}

func (m *Model) senseSite(st *State, site int, dst []model.Sighting) []model.Sighting {
	if l, ok := pointLevel(m.belief(st, site)); ok {
		dst = append(dst, model.Sighting{What: int32(site), Value: int32(l)})
	}
	return dst
}

// Absorb puts robot r on site pos and collapses each reported site to its
// reported level (Observe). A level the belief gave probability 0 is
// accepted all the same: the robot saw the world and the model was wrong
// (a chain that is not quite the real wear), and a fleet that refused the
// report would keep deciding on a belief it knows is false. The report is
// checked in full before x is touched, so an error leaves x as it was.
// Absorb does not check that a robot saw only what the observe mode lets
// it see; the coordinator owns that policy.
func (m *Model) Absorb(x model.State, r int, pos int32, seen []model.Sighting) error {
	st := x.(*State)
	if r < 0 || r >= m.robots {
		return fmt.Errorf("report from robot %d: no such robot (%d robots)", r, m.robots)
	}
	if pos < 0 || int(pos) >= m.n {
		return fmt.Errorf("report from robot %d: position %d is not a site (%d sites)", r, pos, m.n)
	}
	// maxSites caps the sites at 1000, so the duplicate check fits on the stack.
	var small [(maxSites + 63) / 64]uint64
	dup := small[:]
	if m.n > 64*len(small) {
		dup = make([]uint64, (m.n+63)/64)
	}
	for i, sg := range seen {
		if sg.What < 0 || int(sg.What) >= m.n {
			return fmt.Errorf("report from robot %d: sighting %d: site %d does not exist (%d sites)", r, i, sg.What, m.n)
		}
		if sg.Value < 0 || int(sg.Value) > m.levels {
			return fmt.Errorf("report from robot %d: sighting %d: site %d at level %d, want 0..%d", r, i, sg.What, sg.Value, m.levels)
		}
		w, bit := sg.What/64, uint64(1)<<(sg.What%64)
		if dup[w]&bit != 0 {
			return fmt.Errorf("report from robot %d: sighting %d: site %d reported twice", r, i, sg.What)
		}
		dup[w] |= bit
	}
	st.pos[r] = int(pos)
	for _, sg := range seen {
		m.point(st, int(sg.What), int(sg.Value))
	}
	return nil
}

// Flatten appends the robots' sites to ints and the beliefs, site by site
// (L+1 levels each), to reals: the state exactly, bit for bit.
func (m *Model) Flatten(s model.State, ints []int32, reals []float64) ([]int32, []float64) {
	st := s.(*State)
	for _, p := range st.pos {
		ints = append(ints, int32(p))
	}
	for site := range m.n {
		reals = append(reals, m.belief(st, site)...)
	}
	return ints, reals
}

// Unflatten is the inverse of Flatten. Beliefs must be finite, non-negative
// and sum to 1 within 1e-9 per site: a corrupted or misaligned snapshot
// fails that, while rounding in Advance stays far inside it as long as the
// chains' rows sum to 1 to rounding. (A file row that is off by up to the
// 1e-9 the parser allows moves an unobserved site's sum by that much per
// step, and such states are rejected here after a few steps.) The whole
// snapshot is checked before dst is written, so an error leaves dst as it
// was.
func (m *Model) Unflatten(dst model.State, ints []int32, reals []float64) error {
	st := dst.(*State)
	if len(ints) != m.robots {
		return fmt.Errorf("snapshot: %d ints, want %d (one site per robot)", len(ints), m.robots)
	}
	if len(reals) != m.n*m.k {
		return fmt.Errorf("snapshot: %d reals, want %d (%d sites x %d levels)", len(reals), m.n*m.k, m.n, m.k)
	}
	for r, p := range ints {
		if p < 0 || int(p) >= m.n {
			return fmt.Errorf("snapshot: robot %d at site %d, want 0..%d", r, p, m.n-1)
		}
	}
	for site := range m.n {
		sum := 0.0
		for l, q := range reals[site*m.k : (site+1)*m.k] {
			if math.IsNaN(q) || math.IsInf(q, 0) || q < 0 {
				return fmt.Errorf("snapshot: site %d level %d has belief %g, want a finite probability >= 0", site, l, q)
			}
			sum += q
		}
		if math.Abs(sum-1) > beliefTolerance {
			return fmt.Errorf("snapshot: site %d beliefs sum to %.12g, want 1 (within %g)", site, sum, beliefTolerance)
		}
	}
	for r, p := range ints {
		st.pos[r] = int(p)
	}
	copy(st.bel, reals)
	for site := range m.n {
		st.ti[site] = m.rowOf(site, st.bel[site*m.k:site*m.k+m.k])
	}
	return nil
}
