package delivery

import (
	"fmt"
	"math"

	"baton/signal/learn"
	"baton/sim/model"
)

// Features are what the learned guesses (baton/signal/learn) see of a
// delivery state, for robot r deciding at position k of the turn order
// knowing some predecessors' controls: layout "delivery.1",
// 28 + 6*MaxControls inputs (58 for depot.yaml). Inputs are standardised
// by the trained model, so the raw scales only need to be sensible.
//
//   - k/m and a one-hot of the position (0, 1, 2, 3 or later): robots in
//     one state are told apart by their place in the order;
//   - loaded, and the carried parcel's destination relative to the robot
//     (dx, dy over the map's span, hops over the graph's diameter);
//   - other robots at the robot's station, /m, every other robot taken
//     where its known control takes it (the rest where they are); the
//     share of predecessors whose control is known;
//   - parcels waiting and on board, /capacity;
//   - the 3 nearest waiting parcels: present, dx, dy, hops, and the share
//     of other empty robots strictly nearer to it;
//   - per control 0..MaxControls-1: valid, the base policy's choice,
//     whether it brings the carried parcel closer (+1) or farther (-1),
//     the pull of all waiting parcels (sum of 0.8^hops after the move
//     minus from here), the same over parcels no other empty robot is
//     strictly nearer to, and predecessors whose known control takes them
//     to the same station, /m.
type Features struct {
	m     *Model
	span  float64
	diam  float64
	pull  []float64 // pullDisc^d for d = 0..diameter
	moves int       // MaxControls
}

var _ learn.Featurizer = (*Features)(nil)

const (
	posSlots  = 4
	nearest   = 3
	slotSize  = 5
	moveSize  = 6
	pullDisc  = 0.8
	fPos      = 0 // k/m, then posSlots one-hot
	fLoaded   = fPos + 1 + posSlots
	fDest     = fLoaded + 1 // dx, dy, hops
	fShare    = fDest + 3
	fKnown    = fShare + 1
	fWaiting  = fKnown + 1
	fRiding   = fWaiting + 1
	fNear     = fRiding + 1
	fMoves    = fNear + nearest*slotSize
	featureID = "delivery.1"
)

// NewFeatures is the Featurizer of m's instance; register.go hands it to
// learn.RegisterFeatures.
func NewFeatures(mm model.Model) (learn.Featurizer, error) {
	m, ok := mm.(*Model)
	if !ok {
		return nil, fmt.Errorf("delivery features: model is %T, not *delivery.Model", mm)
	}
	f := &Features{m: m, moves: m.MaxControls()}
	minX, maxX, minY, maxY := math.Inf(1), math.Inf(-1), math.Inf(1), math.Inf(-1)
	for _, p := range m.xy {
		minX, maxX = min(minX, p[0]), max(maxX, p[0])
		minY, maxY = min(minY, p[1]), max(maxY, p[1])
	}
	f.span = max(maxX-minX, maxY-minY, 1)
	d := int32(1)
	for _, v := range m.dist {
		d = max(d, v)
	}
	f.diam = float64(d)
	f.pull = make([]float64, d+1)
	f.pull[0] = 1
	for i := 1; i <= int(d); i++ {
		f.pull[i] = f.pull[i-1] * pullDisc
	}
	return f, nil
}

// Scenario implements learn.Featurizer.
func (f *Features) Scenario() string { return "delivery" }

// Version implements learn.Featurizer.
func (f *Features) Version() string { return featureID }

// Size implements learn.Featurizer.
func (f *Features) Size() int { return fMoves + f.moves*moveSize }

// Features implements learn.Featurizer. It allocates nothing (stack
// scratch bounded by MaxRobots) and only reads f, so rollout workers may
// call it at once.
func (f *Features) Features(x model.State, r, k int, prior []int, dst []float64) {
	m, s := f.m, x.(*State)
	clear(dst[:f.Size()])
	n := m.n
	robots := float64(m.robots)

	// Where the others will be: a robot whose control is known is where it
	// takes it, the rest where they are.
	var at0 [MaxRobots]int32
	var moved [MaxRobots]bool
	pos := at0[:m.robots]
	known := 0
	for j, p := range s.Pos {
		pos[j] = p
		if j != r && j < len(prior) && prior[j] >= 0 {
			pos[j] = m.move(p, prior[j])
			moved[j] = true
			known++
		}
	}
	me := s.Pos[r]
	row := m.dist[int(me)*n : (int(me)+1)*n]

	dst[fPos] = float64(k) / max(robots, 1)
	dst[fPos+1+min(k, posSlots-1)] = 1
	if k > 0 {
		dst[fKnown] = float64(known) / float64(k)
	}
	for j, p := range pos {
		if j != r && p == me {
			dst[fShare] += 1 / robots
		}
	}
	slot := s.Carry[r]
	if slot >= 0 {
		to := s.To[slot]
		dst[fLoaded] = 1
		dst[fDest] = (m.xy[to][0] - m.xy[me][0]) / f.span
		dst[fDest+1] = (m.xy[to][1] - m.xy[me][1]) / f.span
		dst[fDest+2] = float64(row[to]) / f.diam
	}

	// The nearest waiting parcels (by hops, then slot), by insertion into
	// a fixed array; and the pull of every move over all waiting parcels.
	var near [nearest]int32
	var nearD [nearest]int32
	cnt := 0
	var pull, free [MaxStations + 1]float64 // per control; a degree is below MaxStations
	nb := m.nbr[me]
	for i, a := range s.At {
		if a < 0 {
			continue
		}
		if int(a) >= n {
			dst[fRiding] += 1 / float64(m.capacity)
			continue
		}
		dst[fWaiting] += 1 / float64(m.capacity)
		d := row[a]
		j := cnt
		for j > 0 && d < nearD[j-1] {
			j--
		}
		if j < nearest {
			if cnt < nearest {
				cnt++
			}
			copy(near[j+1:cnt], near[j:cnt-1])
			copy(nearD[j+1:cnt], nearD[j:cnt-1])
			near[j], nearD[j] = int32(i), d
		}
		mine := true
		for o, p := range pos {
			if o != r && s.Carry[o] < 0 && m.dist[int(p)*n+int(a)] < d {
				mine = false
				break
			}
		}
		for c := 0; c <= len(nb); c++ {
			to := me
			if c > 0 {
				to = nb[c-1]
			}
			p := f.pull[m.dist[int(to)*n+int(a)]]
			pull[c] += p
			if mine {
				free[c] += p
			}
		}
	}
	for i := range cnt {
		a := s.At[near[i]]
		sl := dst[fNear+i*slotSize:]
		sl[0] = 1
		sl[1] = (m.xy[a][0] - m.xy[me][0]) / f.span
		sl[2] = (m.xy[a][1] - m.xy[me][1]) / f.span
		sl[3] = float64(nearD[i]) / f.diam
		for o, p := range pos {
			if o != r && s.Carry[o] < 0 && m.dist[int(p)*n+int(a)] < nearD[i] {
				sl[4] += 1 / robots
			}
		}
	}

	base := m.Base(x, r)
	for c := 0; c <= len(nb) && c < f.moves; c++ {
		mv := dst[fMoves+c*moveSize:]
		to := me
		if c > 0 {
			to = nb[c-1]
		}
		mv[0] = 1
		if c == base {
			mv[1] = 1
		}
		if slot >= 0 {
			switch d0, d1 := row[s.To[slot]], m.dist[int(to)*n+int(s.To[slot])]; {
			case d1 < d0:
				mv[2] = 1
			case d1 > d0:
				mv[2] = -1
			}
		}
		mv[3] = pull[c] - pull[0]
		mv[4] = free[c] - free[0]
		for j, p := range pos {
			if j != r && moved[j] && p == to {
				mv[5] += 1 / robots
			}
		}
	}
}
