package delivery

import (
	"fmt"

	"baton/sim/model"
)

// The fleet's decision state is the world state itself: every robot's
// software reads the dispatch board (which parcel slot holds what), so a
// report from any one robot is enough to rebuild the parcels after the
// arrivals, and each robot reports where it is.
var _ model.Fleet = (*Model)(nil)

// A parcel slot on the wire (Sense's Value, Flatten's ints) is one int32:
// -1 for an empty slot, else at*n + to, where at is the station the parcel
// waits at (0..n-1) or n+r when robot r carries it, and to is its
// destination station. With at most 256 stations and robots it stays far
// below 2^31.
func (m *Model) code(at, to int32) int32 {
	if at < 0 {
		return -1
	}
	return at*int32(m.n) + to
}

// decode checks one slot code; what names the slot in errors.
func (m *Model) decode(c int32) (at, to int32, err error) {
	if c == -1 {
		return -1, -1, nil
	}
	n := int32(m.n)
	if c < 0 || c >= (n+int32(m.robots))*n {
		return 0, 0, fmt.Errorf("code %d is neither -1 (empty) nor a parcel (0..%d)", c, (n+int32(m.robots))*n-1)
	}
	at, to = c/n, c%n
	if at == to {
		return 0, 0, fmt.Errorf("code %d: a parcel waiting at its own destination %s", c, m.names[to])
	}
	return at, to, nil
}

// Advance is Step without the arrivals: moves, drop-off, pick-up, and the
// cost Step returns. Like Step it leaves a terminal state alone.
func (m *Model) Advance(x model.State, u []int) float64 {
	s := x.(*State)
	if m.Terminal(s) {
		return 0
	}
	return m.advance(s, u)
}

// Position is robot r's station.
func (m *Model) Position(x model.State, r int) int32 { return x.(*State).Pos[r] }

// Sense reports every parcel slot by index, with its code (see code). By
// slot, not as a set of parcels: arrivals go into the lowest free slot, so
// which parcel sits in which slot is part of the state.
func (m *Model) Sense(x model.State, _ int, dst []model.Sighting) []model.Sighting {
	s := x.(*State)
	for i, a := range s.At {
		dst = append(dst, model.Sighting{What: int32(i), Value: m.code(a, s.To[i])})
	}
	return dst
}

// Absorb puts robot r on station pos and every reported slot to its
// reported contents, then recomputes who carries what. The merged state
// is checked in full before x is touched (each robot carries at most one
// parcel), so an error leaves x as it was. It does not hand out parcels
// that wait where an empty robot stands: after the arrivals that is a
// legal state, and the next step's pick-up takes them.
func (m *Model) Absorb(x model.State, r int, pos int32, seen []model.Sighting) error {
	s := x.(*State)
	if r < 0 || r >= m.robots {
		return fmt.Errorf("report from robot %d: no such robot (%d robots)", r, m.robots)
	}
	if pos < 0 || int(pos) >= m.n {
		return fmt.Errorf("report from robot %d: position %d is not a station (%d stations)", r, pos, m.n)
	}
	// The merged slots, on the stack: capacity is at most MaxCapacity.
	var merged [MaxCapacity]int32
	var reported [MaxCapacity / 64]uint64
	slots := merged[:m.capacity]
	for i, a := range s.At {
		slots[i] = m.code(a, s.To[i])
	}
	for i, sg := range seen {
		if sg.What < 0 || int(sg.What) >= m.capacity {
			return fmt.Errorf("report from robot %d: sighting %d: slot %d does not exist (%d slots)", r, i, sg.What, m.capacity)
		}
		if _, _, err := m.decode(sg.Value); err != nil {
			return fmt.Errorf("report from robot %d: sighting %d: slot %d: %w", r, i, sg.What, err)
		}
		w, bit := sg.What/64, uint64(1)<<(sg.What%64)
		if reported[w]&bit != 0 {
			return fmt.Errorf("report from robot %d: sighting %d: slot %d reported twice", r, i, sg.What)
		}
		reported[w] |= bit
		slots[sg.What] = sg.Value
	}
	if err := m.checkLoads(slots); err != nil {
		return fmt.Errorf("report from robot %d: %w", r, err)
	}
	s.Pos[r] = pos
	m.setSlots(s, slots)
	return nil
}

// checkLoads refuses slots (already decoded one by one) in which a robot
// carries two parcels.
func (m *Model) checkLoads(slots []int32) error {
	var carrier [MaxRobots]int32
	for i := range m.robots {
		carrier[i] = -1
	}
	for i, c := range slots {
		at, _, _ := m.decode(c)
		if at < int32(m.n) {
			continue
		}
		r := at - int32(m.n)
		if carrier[r] >= 0 {
			return fmt.Errorf("robot %d carries two parcels (slots %d and %d); a robot carries one", r, carrier[r], i)
		}
		carrier[r] = int32(i)
	}
	return nil
}

// setSlots writes checked slot codes into s and derives Carry.
func (m *Model) setSlots(s *State, slots []int32) {
	for r := range s.Carry {
		s.Carry[r] = -1
	}
	for i, c := range slots {
		at, to, _ := m.decode(c)
		s.At[i], s.To[i] = at, to
		if at >= int32(m.n) {
			s.Carry[at-int32(m.n)] = int32(i)
		}
	}
}

// Flatten appends the robots' stations, then every slot's code. Carry is
// derived, so it is not sent; there are no reals.
func (m *Model) Flatten(x model.State, ints []int32, reals []float64) ([]int32, []float64) {
	s := x.(*State)
	ints = append(ints, s.Pos...)
	for i, a := range s.At {
		ints = append(ints, m.code(a, s.To[i]))
	}
	return ints, reals
}

// Unflatten is the inverse of Flatten. It checks the whole snapshot before
// writing dst, so an error leaves dst as it was.
func (m *Model) Unflatten(dst model.State, ints []int32, reals []float64) error {
	s := dst.(*State)
	nr, ns := m.robots, m.capacity
	if len(ints) != nr+ns {
		return fmt.Errorf("snapshot: %d ints, want %d (%d robots + %d parcel slots)", len(ints), nr+ns, nr, ns)
	}
	if len(reals) != 0 {
		return fmt.Errorf("snapshot: %d reals, want 0 (a delivery state has none)", len(reals))
	}
	for r, p := range ints[:nr] {
		if p < 0 || int(p) >= m.n {
			return fmt.Errorf("snapshot: robot %d at %d, not a station (%d stations)", r, p, m.n)
		}
	}
	slots := ints[nr:]
	for i, c := range slots {
		if _, _, err := m.decode(c); err != nil {
			return fmt.Errorf("snapshot: slot %d: %w", i, err)
		}
	}
	if err := m.checkLoads(slots); err != nil {
		return fmt.Errorf("snapshot: %w", err)
	}
	copy(s.Pos, ints[:nr])
	m.setSlots(s, slots)
	return nil
}
