package harbor

import (
	"fmt"

	"baton/sim/model"
)

// The harbor is fully observed, so the fleet's decision state is the world
// state itself: every boat's radar sees every slick, and a report from any
// one boat is enough to rebuild the slicks after the drift.
var _ model.Fleet = (*Model)(nil)

// advance is steps 1-3 of a step: boats move, slicks under a boat are
// collected, the cost is what is left. Step, Outcomes and Advance all call
// it, so the fleet's prediction and the simulation cannot drift apart.
func (m *Model) advance(s *State, u []int) float64 {
	for i, c := range s.Boats {
		s.Boats[i] = m.move(c, u[i])
	}
	m.collect(s)
	return float64(s.Left)
}

// Advance is Step without the drift: boats move and collect, and the cost is
// the one Step returns. Like Step it leaves a terminal state alone and
// returns 0.
func (m *Model) Advance(x model.State, u []int) float64 {
	s := x.(*State)
	if s.Left == 0 {
		return 0
	}
	return m.advance(s, u)
}

// Position is boat r's cell.
func (m *Model) Position(s model.State, r int) int32 { return s.(*State).Boats[r] }

// Sense reports every slick by index, with its cell or -1 once collected.
// By index, not as a set of cells: Step draws one uniform per slick index,
// so which slick is where matters for common random numbers.
func (m *Model) Sense(s model.State, _ int, dst []model.Sighting) []model.Sighting {
	for i, c := range s.(*State).Slicks {
		dst = append(dst, model.Sighting{What: int32(i), Value: c})
	}
	return dst
}

func (m *Model) isCell(c int32) bool { return c >= 0 && int(c) < m.w*m.h }

// Absorb sets boat r to pos and every reported slick to its reported cell
// (or collected), then recounts Left. It does not collect slicks that sit
// under a boat: after the drift that is a legal state, and the next step
// collects them. A slick reported at a cell after being collected is taken
// as reported: the world is right. The report is checked in full before x
// is touched, so an error leaves x as it was.
func (m *Model) Absorb(x model.State, r int, pos int32, seen []model.Sighting) error {
	s := x.(*State)
	if r < 0 || r >= len(s.Boats) {
		return fmt.Errorf("report from boat %d: no such boat (%d boats)", r, len(s.Boats))
	}
	if !m.isCell(pos) {
		return fmt.Errorf("report from boat %d: position %d is not a cell of the %d x %d grid", r, pos, m.w, m.h)
	}
	// Validate caps slicks at 1000, so the duplicate check fits on the stack.
	var small [16]uint64
	dup := small[:]
	if n := len(s.Slicks); n > 64*len(small) {
		dup = make([]uint64, (n+63)/64)
	}
	for i, sg := range seen {
		if sg.What < 0 || int(sg.What) >= len(s.Slicks) {
			return fmt.Errorf("report from boat %d: sighting %d: slick %d does not exist (%d slicks)", r, i, sg.What, len(s.Slicks))
		}
		if sg.Value != -1 && !m.isCell(sg.Value) {
			return fmt.Errorf("report from boat %d: sighting %d: slick %d at %d, which is neither -1 (collected) nor a cell of the %d x %d grid", r, i, sg.What, sg.Value, m.w, m.h)
		}
		w, bit := sg.What/64, uint64(1)<<(sg.What%64)
		if dup[w]&bit != 0 {
			return fmt.Errorf("report from boat %d: sighting %d: slick %d reported twice", r, i, sg.What)
		}
		dup[w] |= bit
	}
	s.Boats[r] = pos
	for _, sg := range seen {
		s.Slicks[sg.What] = sg.Value
	}
	s.Left = left(s.Slicks)
	return nil
}

func left(slicks []int32) int {
	n := 0
	for _, c := range slicks {
		if c >= 0 {
			n++
		}
	}
	return n
}

// Flatten appends the boats' cells, then the slicks' cells (-1: collected).
// Left is derived, so it is not sent; harbor has no reals.
func (m *Model) Flatten(s model.State, ints []int32, reals []float64) ([]int32, []float64) {
	st := s.(*State)
	ints = append(ints, st.Boats...)
	ints = append(ints, st.Slicks...)
	return ints, reals
}

// Unflatten is the inverse of Flatten. It checks the whole snapshot before
// writing dst, so an error leaves dst as it was.
func (m *Model) Unflatten(dst model.State, ints []int32, reals []float64) error {
	s := dst.(*State)
	nb, ns := len(s.Boats), len(s.Slicks)
	if len(ints) != nb+ns {
		return fmt.Errorf("snapshot: %d ints, want %d (%d boats + %d slicks)", len(ints), nb+ns, nb, ns)
	}
	if len(reals) != 0 {
		return fmt.Errorf("snapshot: %d reals, want 0 (a harbor state has none)", len(reals))
	}
	for i, c := range ints[:nb] {
		if !m.isCell(c) {
			return fmt.Errorf("snapshot: boat %d at %d, not a cell of the %d x %d grid", i, c, m.w, m.h)
		}
	}
	for i, c := range ints[nb:] {
		if c != -1 && !m.isCell(c) {
			return fmt.Errorf("snapshot: slick %d at %d, neither -1 (collected) nor a cell of the %d x %d grid", i, c, m.w, m.h)
		}
	}
	copy(s.Boats, ints[:nb])
	copy(s.Slicks, ints[nb:])
	s.Left = left(s.Slicks)
	return nil
}
