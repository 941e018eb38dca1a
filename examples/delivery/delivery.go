// Package delivery is an example of a scenario of an integrator's own,
// outside Baton's repository: delivery robots carry parcels between the
// stations of a small road graph.
//
// Importing the package registers it (see register.go) with Baton's
// commands as scenario "delivery", with features for learned guesses, so
// an integrator's own agentd, coordinator and sim binaries (cmd/) run it
// like the built-in scenarios.
//
// # The problem
//
// Stations sit on a road graph; a robot drives one road per step. Parcels
// appear at stations, each with a destination station, and wait there
// until a robot picks them up; a robot carries at most one parcel. One
// step, in this order:
//
//  1. every robot moves: control 0 stays at its station, control i
//     (1..deg) drives to the i-th neighbour of its station, neighbours
//     sorted by station index (the file's order). A control out of range
//     also stays: a guess from elsewhere can never crash a simulation;
//  2. drop-off: a robot carrying a parcel whose destination is its station
//     delivers it (the parcel leaves the system);
//  3. pick-up: each robot without a parcel, in robot order, takes the
//     waiting parcel at its station with the nearest destination (ties:
//     the lower slot), so a robot that just delivered can leave loaded;
//  4. the stage cost is wait_cost per parcel still waiting plus ride_cost
//     per parcel on board;
//  5. arrivals: each station, in station order, draws two uniforms: with
//     probability send a parcel appears there, its destination drawn from
//     the other stations by their receive weights. It goes into the lowest
//     free parcel slot; when all capacity slots are taken it is turned
//     away (capacity bounds the state, so keep it well above the load).
//
// Handling (2 and 3) is automatic: there is no separate "handle" control,
// a robot that wants a parcel at its station simply stays (control 0)
// for a step, and a robot passing through a station with a free hand
// picks up what waits there. Step 5 always draws 2 uniforms per station,
// whatever the robots do, so every candidate control of a rollout sees
// the same arrivals (common random numbers).
//
// The episode is never over while any station sends parcels; with every
// send rate 0 it ends (a cost-free absorbing state) once the start
// parcels are delivered. Distances are hops; x and y are for drawing.
//
// # Base policy
//
// Greedy, by shortest path (ties: the lower-index neighbour): a loaded
// robot heads for its parcel's destination; an empty one heads for the
// nearest waiting parcel (ties: the lower slot), staying when it stands on
// it; with nothing waiting it stays. Empty robots do not see each other,
// so several chase the same parcel: that is what rollout improves.
package delivery

import (
	"fmt"
	"math/rand/v2"

	"baton/sim/model"
)

// Limits a file is held to: they bound the tables (stations^2) and the
// stack scratch Absorb and the features use, which is how they avoid
// allocating.
const (
	MaxStations = 256
	MaxRobots   = 256
	MaxCapacity = 1024
	MaxHorizon  = 100000
)

// Model is one configured delivery instance. It is read-only after
// construction, so many goroutines may step states of one Model at once.
type Model struct {
	n        int // stations
	robots   int
	capacity int // parcel slots
	names    []string
	xy       [][2]float64
	nbr      [][]int32 // sorted by station index: control i moves to nbr[s][i-1]
	dist     []int32   // n*n hop counts
	hop      []int32   // n*n control that moves one hop from a toward b (0 if a == b)
	send     []float64 // per station: probability a parcel appears per step
	destCum  []float64 // n*n: row a is the cumulative destination distribution of a parcel from a
	sends    bool      // some station sends parcels: the episode never ends
	waitCost float64
	rideCost float64
	discount float64
	horizon  int
	maxCtl   int
	startPos []int32
	startPar [][2]int32 // initial parcels: station, destination
}

// State is the full state: where each robot is and what each parcel slot
// holds. Carry is derived from At (Absorb and Unflatten recompute it).
type State struct {
	Pos []int32 // station of each robot
	// At is per parcel slot: -1 empty; 0..n-1 waiting at that station;
	// n+r on board robot r.
	At []int32
	// To is each slot's destination station (-1 when empty).
	To []int32
	// Carry is the slot robot r carries, -1 none.
	Carry []int32
}

var (
	_ model.Model          = (*Model)(nil)
	_ model.TerminalCoster = (*Model)(nil)
	_ model.ControlNamer   = (*Model)(nil)
)

// Name implements model.Model.
func (m *Model) Name() string { return "delivery" }

// Robots implements model.Model.
func (m *Model) Robots() int { return m.robots }

// MaxControls is the highest station degree plus one.
func (m *Model) MaxControls() int { return m.maxCtl }

// Discount implements model.Model.
func (m *Model) Discount() float64 { return m.discount }

// Horizon implements model.Model.
func (m *Model) Horizon() int { return m.horizon }

// NewState allocates a zeroed *State.
func (m *Model) NewState() model.State {
	return &State{Pos: make([]int32, m.robots), At: make([]int32, m.capacity),
		To: make([]int32, m.capacity), Carry: make([]int32, m.robots)}
}

// CopyState copies src into dst.
func (m *Model) CopyState(dst, src model.State) {
	d, s := dst.(*State), src.(*State)
	copy(d.Pos, s.Pos)
	copy(d.At, s.At)
	copy(d.To, s.To)
	copy(d.Carry, s.Carry)
}

// Start puts the robots on their start stations and the file's start
// parcels into the first slots, then hands parcels out as at the end of a
// step (a robot starting where a parcel waits has it on board). rng is not
// used: the start is fixed, and episodes differ by their arrivals.
func (m *Model) Start(dst model.State, _ *rand.Rand) {
	s := dst.(*State)
	copy(s.Pos, m.startPos)
	for r := range s.Carry {
		s.Carry[r] = -1
	}
	for i := range s.At {
		s.At[i], s.To[i] = -1, -1
		if i < len(m.startPar) {
			s.At[i], s.To[i] = m.startPar[i][0], m.startPar[i][1]
		}
	}
	m.handle(s)
}

// NumControls is the degree of robot r's station plus one.
func (m *Model) NumControls(s model.State, r int) int {
	return len(m.nbr[s.(*State).Pos[r]]) + 1
}

// Terminal is true only when no station sends parcels and none is left.
func (m *Model) Terminal(x model.State) bool {
	if m.sends {
		return false
	}
	for _, a := range x.(*State).At {
		if a >= 0 {
			return false
		}
	}
	return true
}

// move is where control c takes a robot at station at; out of range stays.
func (m *Model) move(at int32, c int) int32 {
	nb := m.nbr[at]
	if c < 1 || c > len(nb) {
		return at
	}
	return nb[c-1]
}

// advance is steps 1-4: moves, drop-off, pick-up, cost. Step and Advance
// both call it, so the fleet's prediction cannot drift from the simulation.
func (m *Model) advance(s *State, u []int) float64 {
	for r, c := range u {
		s.Pos[r] = m.move(s.Pos[r], c)
	}
	return m.handle(s)
}

// handle is drop-off and pick-up (steps 2-3) and returns the stage cost.
func (m *Model) handle(s *State) float64 {
	n := int32(m.n)
	for r, slot := range s.Carry {
		if slot >= 0 && s.To[slot] == s.Pos[r] {
			s.At[slot], s.To[slot], s.Carry[r] = -1, -1, -1
		}
	}
	for r, slot := range s.Carry {
		if slot >= 0 {
			continue
		}
		at := s.Pos[r]
		row := m.dist[int(at)*m.n:]
		best, bestD := int32(-1), int32(1<<30)
		for i, a := range s.At {
			if a == at && row[s.To[i]] < bestD {
				best, bestD = int32(i), row[s.To[i]]
			}
		}
		if best >= 0 {
			s.At[best], s.Carry[r] = n+int32(r), best
		}
	}
	waiting, riding := 0, 0
	for _, a := range s.At {
		switch {
		case a < 0:
		case a < n:
			waiting++
		default:
			riding++
		}
	}
	return m.waitCost*float64(waiting) + m.rideCost*float64(riding)
}

// Step implements model.Model: advance (steps 1-4), then the arrivals,
// two uniforms per station in station order whatever happens.
func (m *Model) Step(x model.State, u []int, rng *rand.Rand) float64 {
	s := x.(*State)
	if m.Terminal(s) {
		return 0
	}
	cost := m.advance(s, u)
	for st := range m.n {
		a, b := rng.Float64(), rng.Float64()
		if a >= m.send[st] {
			continue
		}
		slot := -1
		for i, v := range s.At {
			if v < 0 {
				slot = i
				break
			}
		}
		if slot < 0 {
			continue // full: turned away
		}
		s.At[slot], s.To[slot] = int32(st), m.destination(st, b)
	}
	return cost
}

// destination inverts station from's destination distribution at b.
func (m *Model) destination(from int, b float64) int32 {
	row := m.destCum[from*m.n : (from+1)*m.n]
	last := int32(-1)
	for to, c := range row {
		if to == from {
			continue
		}
		if b < c {
			return int32(to)
		}
		if c > 0 {
			last = int32(to)
		}
	}
	// Rounding left the row a hair below 1: the last possible destination.
	return last
}

// Base is the greedy base policy; see the package comment.
func (m *Model) Base(x model.State, r int) int {
	s := x.(*State)
	at := s.Pos[r]
	if slot := s.Carry[r]; slot >= 0 {
		return int(m.hop[int(at)*m.n+int(s.To[slot])])
	}
	row := m.dist[int(at)*m.n:]
	best, bestD := int32(-1), int32(1<<30)
	for _, a := range s.At {
		if a >= 0 && int(a) < m.n && row[a] < bestD {
			best, bestD = a, row[a]
		}
	}
	if best < 0 {
		return 0
	}
	return int(m.hop[int(at)*m.n+int(best)])
}

// TerminalCost estimates the cost still to come from the parcels already
// in the system where a rollout truncates: a parcel on board rides as many
// steps as its destination is away; a waiting one waits as long as the
// nearest robot is away, then rides. It ignores arrivals still to come and
// robots being busy (a heuristic, as harbor's is).
func (m *Model) TerminalCost(x model.State) float64 {
	s := x.(*State)
	n := int32(m.n)
	total := 0.0
	for i, a := range s.At {
		switch {
		case a < 0:
		case a < n:
			near := int32(1 << 30)
			for _, p := range s.Pos {
				near = min(near, m.dist[int(p)*m.n+int(a)])
			}
			total += m.waitCost*float64(near) + m.rideCost*float64(m.dist[int(a)*m.n+int(s.To[i])])
		default:
			total += m.rideCost * float64(m.dist[int(s.Pos[a-n])*m.n+int(s.To[i])])
		}
	}
	return total
}

// ControlName is "stay" for 0 and "to <station>" for a move. Control 0 is
// "stay", never "hold": that is the runtime's word for "no decision".
func (m *Model) ControlName(x model.State, r, c int) string {
	if c == 0 {
		return "stay"
	}
	nb := m.nbr[x.(*State).Pos[r]]
	if c < 0 || c > len(nb) {
		return fmt.Sprintf("control %d (invalid)", c)
	}
	return "to " + m.names[nb[c-1]]
}

// Stations is the number of stations.
func (m *Model) Stations() int { return m.n }

// Capacity is the number of parcel slots.
func (m *Model) Capacity() int { return m.capacity }

// StationName is station i's name.
func (m *Model) StationName(i int) string { return m.names[i] }

// StationXY is station i's map position.
func (m *Model) StationXY(i int) (x, y float64) { return m.xy[i][0], m.xy[i][1] }

// Neighbours are the stations one road from i, sorted by index (the order
// of controls 1..deg). It aliases the model; do not modify it.
func (m *Model) Neighbours(i int) []int32 { return m.nbr[i] }

// Distance is the hop count between stations a and b.
func (m *Model) Distance(a, b int) int { return int(m.dist[a*m.n+b]) }

// Toward is the control that moves one hop from a toward b (0 when a == b).
func (m *Model) Toward(a, b int) int { return int(m.hop[a*m.n+b]) }
