package learn

import (
	"fmt"

	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// Featurizer turns (state, robot, turn position) into a fixed-length vector.
// Features must not allocate and must be safe for concurrent use: rollout
// workers call them inside simulations.
type Featurizer interface {
	// Scenario is the model name the features are for.
	Scenario() string
	// Version names the layout; a model trained on another layout is refused.
	Version() string
	// Size is the vector length.
	Size() int
	// Features fills dst (len Size()) for robot r deciding at position k,
	// given its predecessors' controls where known: prior[j] is robot j's
	// control this round, -1 when not known (nil: none known). Rollout
	// decides robot r knowing its predecessors' choices; the features see
	// the same, so robots in one place get told apart by what the robots
	// before them do.
	Features(x model.State, r, k int, prior []int, dst []float64) // dst fully overwritten
}

// modelOf is implemented by the package's featurizers; Predict uses it to
// mask controls that are invalid at a state.
type modelOf interface{ model() model.Model }

// FeaturizerFor returns the featurizer of m's scenario. A model wrapped by
// AsBase is unwrapped: the features describe the scenario, not the base.
func FeaturizerFor(m model.Model) (Featurizer, error) {
	if lb, ok := m.(learnedBase); ok {
		m = lb.inner()
	}
	switch sm := m.(type) {
	case *harbor.Model:
		return newHarborFeatures(sm), nil
	case *upkeep.Model:
		return newUpkeepFeatures(sm), nil
	}
	if f, ok := registered[m.Name()]; ok {
		return f(m)
	}
	return nil, fmt.Errorf("learn: no features for scenario %q (known: harbor, upkeep%s; a scenario of your own registers them with learn.RegisterFeatures)",
		m.Name(), registeredNames())
}

// registered are the features of scenarios registered from outside.
var registered = map[string]func(model.Model) (Featurizer, error){}

// RegisterFeatures gives learned guesses for scenario name (registered
// with sim/scenarios.Register): f builds the Featurizer for an instance.
// Call it before any command runs; a name registered twice panics.
func RegisterFeatures(name string, f func(model.Model) (Featurizer, error)) {
	if _, taken := registered[name]; taken || name == "harbor" || name == "upkeep" {
		panic(fmt.Sprintf("learn: features for %q registered twice", name))
	}
	registered[name] = f
}

func registeredNames() string {
	var s string
	for n := range registered {
		s += ", " + n
	}
	return s
}

// posSlots is the one-hot width of the turn position: 0, 1, 2 and "3 or
// later". Rollout's spreading mostly differs between the first few turns.
const posSlots = 4

func position(k, m int, dst []float64) {
	dst[0] = float64(k) / float64(max(m, 1))
	dst[1+min(k, posSlots-1)] = 1
}

// ---- harbor ----

// harborNearest is how many slicks a boat looks at: the base policy chases
// the nearest, rollout's alternatives are nearly always among the next few.
const harborNearest = 4

const (
	hOwnX     = 0
	hOwnY     = 1
	hShare    = 2
	hPos      = 3 // k/m, then posSlots one-hot
	hLeft     = hPos + 1 + posSlots
	hBase     = hLeft + 1    // 5 one-hot
	hBlocked  = hBase + 5    // 4 moves
	hCloser   = hBlocked + 4 // 4 moves
	hPull     = hCloser + 4  // 4 moves
	hFree     = hPull + 4    // 4 moves
	hCrowd    = hFree + 4    // 4 moves: predecessors heading to that cell
	hKnown    = hCrowd + 4   // share of predecessors whose control is known
	hSlicks   = hKnown + 1   // harborNearest slots
	hSlotSize = 6            // present, dx, dy, dist, nearer, tied
	hSize     = hSlicks + harborNearest*hSlotSize
)

type harborFeatures struct {
	m      *harbor.Model
	w, h   int
	robots int
	slicks int
	pull   []float64 // pullDisc^d for every grid distance d
}

func newHarborFeatures(m *harbor.Model) *harborFeatures {
	return &harborFeatures{m: m, w: m.Width(), h: m.Height(), robots: m.Robots(), slicks: m.Config().Slicks,
		pull: powers(pullDisc, m.Width()+m.Height())}
}

func (f *harborFeatures) Scenario() string   { return "harbor" }
func (f *harborFeatures) Version() string    { return "harbor.2" }
func (f *harborFeatures) Size() int          { return hSize }
func (f *harborFeatures) model() model.Model { return f.m }

// harbor moves N, S, E, W (controls 1..4); y grows northwards.
var hdx = [5]int{0, 0, 0, 1, -1}
var hdy = [5]int{0, 1, -1, 0, 0}

func iabs(v int) int {
	if v < 0 {
		return -v
	}
	return v
}

// maxHarborBoats bounds the boats the features track on the stack.
const maxHarborBoats = 256

func (f *harborFeatures) Features(x model.State, r, k int, prior []int, dst []float64) {
	s := x.(*harbor.State)
	clear(dst[:hSize])
	w, h := f.w, f.h
	me := s.Boats[r]
	// Where the other boats will be: a predecessor whose control is known
	// is where that control takes it, the rest where they are.
	var at [maxHarborBoats]int32
	boats := at[:min(len(s.Boats), maxHarborBoats)]
	copy(boats, s.Boats)
	known := 0
	for j := range boats {
		if j == r || j >= len(prior) || prior[j] < 0 || prior[j] > 4 {
			continue
		}
		known++
		c := prior[j]
		nx, ny := int(boats[j])%w+hdx[c], int(boats[j])/w+hdy[c]
		if nx >= 0 && nx < w && ny >= 0 && ny < h {
			boats[j] = int32(ny*w + nx)
		}
	}
	if k > 0 {
		dst[hKnown] = float64(known) / float64(k)
	}
	bx, by := int(me)%w, int(me)/w
	if w > 1 {
		dst[hOwnX] = float64(bx) / float64(w-1)
	}
	if h > 1 {
		dst[hOwnY] = float64(by) / float64(h-1)
	}
	share := 0
	for j, b := range boats {
		if j != r && b == me {
			share++
		}
	}
	dst[hShare] = float64(share) / float64(f.robots)
	for mv := 1; mv <= 4; mv++ {
		nx, ny := bx+hdx[mv], by+hdy[mv]
		if nx < 0 || nx >= w || ny < 0 || ny >= h {
			continue
		}
		cell := int32(ny*w + nx)
		for j, b := range boats {
			if j != r && j < len(prior) && prior[j] >= 0 && b == cell {
				dst[hCrowd+mv-1] += 1 / float64(f.robots)
			}
		}
	}
	position(k, f.robots, dst[hPos:])
	if f.slicks > 0 {
		dst[hLeft] = float64(s.Left) / float64(f.slicks)
	}
	dst[hBase+f.m.Base(x, r)] = 1
	for c := 1; c <= 4; c++ {
		nx, ny := bx+hdx[c], by+hdy[c]
		if nx < 0 || nx >= w || ny < 0 || ny >= h {
			dst[hBlocked+c-1] = 1
		}
	}

	// The nearest slicks, by distance then cell: insertion into a fixed
	// array keeps this allocation-free.
	var near [harborNearest]int32
	var nearD [harborNearest]int
	n := 0
	for _, c := range s.Slicks {
		if c < 0 {
			continue
		}
		d := iabs(int(c)%w-bx) + iabs(int(c)/w-by)
		i := n
		for i > 0 && (d < nearD[i-1] || (d == nearD[i-1] && c < near[i-1])) {
			i--
		}
		if i >= harborNearest {
			continue
		}
		if n < harborNearest {
			n++
		}
		copy(near[i+1:n], near[i:n-1])
		copy(nearD[i+1:n], nearD[i:n-1])
		near[i], nearD[i] = c, d
	}
	// Pull of each move: sum over all slicks of pullDisc^distance after the
	// move minus the same from here, once over every slick and once over
	// those no other boat is strictly nearer to (the ones left for me).
	var pull, free [5]float64
	for _, c := range s.Slicks {
		if c < 0 {
			continue
		}
		tx, ty := int(c)%w, int(c)/w
		d := iabs(tx-bx) + iabs(ty-by)
		mine := true
		for j, b := range boats {
			if j != r && iabs(int(b)%w-tx)+iabs(int(b)/w-ty) < d {
				mine = false
				break
			}
		}
		for mv := range 5 {
			nx, ny := bx+hdx[mv], by+hdy[mv]
			if nx < 0 || nx >= w || ny < 0 || ny >= h {
				nx, ny = bx, by
			}
			p := f.pull[iabs(nx-tx)+iabs(ny-ty)]
			pull[mv] += p
			if mine {
				free[mv] += p
			}
		}
	}
	for mv := 1; mv <= 4; mv++ {
		dst[hPull+mv-1] = pull[mv] - pull[0]
		dst[hFree+mv-1] = free[mv] - free[0]
	}

	span := float64(w + h)
	for i := range n {
		c, d := near[i], nearD[i]
		tx, ty := int(c)%w, int(c)/w
		slot := dst[hSlicks+i*hSlotSize:]
		slot[0] = 1
		slot[1] = float64(tx-bx) / float64(w)
		slot[2] = float64(ty-by) / float64(h)
		slot[3] = float64(d) / span
		nearer, tied := 0, 0
		for j, b := range boats {
			if j == r {
				continue
			}
			switch od := iabs(int(b)%w-tx) + iabs(int(b)/w-ty); {
			case od < d:
				nearer++
			case od == d:
				tied++
			}
		}
		slot[4] = float64(nearer) / float64(f.robots)
		slot[5] = float64(tied) / float64(f.robots)
		for mv := 1; mv <= 4; mv++ {
			nx, ny := bx+hdx[mv], by+hdy[mv]
			if nx < 0 || nx >= w || ny < 0 || ny >= h {
				continue
			}
			if iabs(nx-tx)+iabs(ny-ty) < d {
				dst[hCloser+mv-1] += 1.0 / harborNearest
			}
		}
	}
}

// pullDisc discounts a slick's pull per step of distance.
const pullDisc = 0.8

// ---- upkeep ----

// Discounts per hop for the directional risk sums: a near and a far view,
// and the one the threshold-chasing summary uses.
const (
	discNear = 0.5
	discFar  = 0.85
	discMid  = 0.7
)

const (
	uPos      = 0 // k/m, then posSlots one-hot
	uShare    = uPos + 1 + posSlots
	uTotal    = uShare + 1
	uOwn      = uTotal + 1 // 6 own-site features
	uMoves    = uOwn + 6
	uMoveSize = 9 // valid, ec, pT, near, far, unclaimed, maxPT, others, base
)

type upkeepFeatures struct {
	m       *upkeep.Model
	sites   int
	levels  int
	robots  int
	moves   int // MaxControls-1
	thresh  int // base policy's threshold level T
	cost    []float64
	maxCost float64
	pNear   []float64 // discNear^d, d = 0..sites
	pFar    []float64
	pMid    []float64
}

func newUpkeepFeatures(m *upkeep.Model) *upkeepFeatures {
	f := &upkeepFeatures{m: m, sites: m.NumSites(), levels: m.Levels(), robots: m.Robots(),
		moves: m.MaxControls() - 1}
	for l := 0; l <= f.levels; l++ {
		c := m.LevelCost(l)
		f.cost = append(f.cost, c)
		f.maxCost = max(f.maxCost, c)
	}
	if f.maxCost <= 0 {
		f.maxCost = 1
	}
	f.pNear, f.pFar, f.pMid = powers(discNear, f.sites), powers(discFar, f.sites), powers(discMid, f.sites)
	f.thresh = probeThreshold(m)
	return f
}

func powers(a float64, n int) []float64 {
	p := make([]float64, n+1)
	p[0] = 1
	for i := 1; i <= n; i++ {
		p[i] = p[i-1] * a
	}
	return p
}

// probeThreshold finds the base policy's threshold level T, which upkeep
// does not export: with every site known fine except one neighbour of robot
// 0 known at level l, base moves there exactly when l >= T (the probability
// of level >= T is then 1, above any threshold probability below 1). When
// no level triggers it, half the top level is as good a summary as any.
func probeThreshold(m *upkeep.Model) int {
	fallback := (m.Levels() + 1) / 2
	x := m.NewState()
	m.Start(x, nil)
	at := m.Positions(x)[0]
	nb := m.Neighbours(at)
	if len(nb) == 0 {
		return fallback
	}
	for s := range m.NumSites() {
		m.Observe(x, s, 0)
	}
	if m.Base(x, 0) != 0 {
		return fallback
	}
	for l := 1; l <= m.Levels(); l++ {
		m.Observe(x, nb[0], l)
		if m.Base(x, 0) == 1 {
			return l
		}
	}
	return fallback
}

func (f *upkeepFeatures) Scenario() string   { return "upkeep" }
func (f *upkeepFeatures) Version() string    { return "upkeep.2" }
func (f *upkeepFeatures) Size() int          { return uMoves + f.moves*uMoveSize }
func (f *upkeepFeatures) model() model.Model { return f.m }

// siteRisk is a site's expected stage cost (normalised) and P(level >= T).
func (f *upkeepFeatures) siteRisk(x model.State, site int) (ec, pT float64) {
	b := f.m.Belief(x, site)
	for l, q := range b {
		ec += q * f.cost[l]
		if l >= f.thresh {
			pT += q
		}
	}
	return ec / f.maxCost, pT
}

// maxUpkeepRobots bounds the robots the features track on the stack.
const maxUpkeepRobots = 256

func (f *upkeepFeatures) Features(x model.State, r, k int, prior []int, dst []float64) {
	m := f.m
	clear(dst[:f.Size()])
	// Where the other robots will be: a predecessor whose control is known
	// is at the site it moves to (0 services where it is), the rest where
	// they are.
	var at0 [maxUpkeepRobots]int
	pos := at0[:0]
	for j, p := range m.Positions(x) {
		if j >= maxUpkeepRobots {
			break
		}
		p := int(p)
		if j != r && j < len(prior) && prior[j] > 0 {
			if nb := m.Neighbours(p); prior[j]-1 < len(nb) {
				p = nb[prior[j]-1]
			}
		}
		pos = append(pos, p)
	}
	at := pos[r]
	position(k, f.robots, dst[uPos:])
	share := 0
	for j, p := range pos {
		if j != r && p == at {
			share++
		}
	}
	dst[uShare] = float64(share) / float64(f.robots)
	base := m.Base(x, r)

	// Own site: what servicing (control 0) would buy.
	b := m.Belief(x, at)
	ec, pT := f.siteRisk(x, at)
	own := dst[uOwn:]
	own[0] = ec
	own[1] = 1 - b[0]
	own[2] = pT
	known, level := false, 0.0
	for l, q := range b {
		if q == 1 {
			known = true
		}
		level += q * float64(l)
	}
	if known {
		own[3] = 1
	}
	own[4] = level / float64(max(f.levels, 1))
	if base == 0 {
		own[5] = 1
	}

	nb := m.Neighbours(at)
	for c := range min(len(nb), f.moves) {
		mv := dst[uMoves+c*uMoveSize:]
		v := nb[c]
		mv[0] = 1
		mv[1], mv[2] = f.siteRisk(x, v)
		for j, p := range pos {
			if j != r && p == v {
				mv[7] += 1 / float64(f.robots)
			}
		}
		if base == c+1 {
			mv[8] = 1
		}
	}

	// Directional risk: each site t counts for every move whose neighbour
	// lies on a shortest path to it, discounted by the hops to get there.
	total := 0.0
	for t := range f.sites {
		ec, pT := f.siteRisk(x, t)
		total += ec
		d := m.Distance(at, t)
		if d <= 0 {
			continue
		}
		claimed := false
		for j, p := range pos {
			if j != r && m.Distance(p, t) < d {
				claimed = true
				break
			}
		}
		for c := range min(len(nb), f.moves) {
			if m.Distance(nb[c], t) != d-1 {
				continue
			}
			mv := dst[uMoves+c*uMoveSize:]
			mv[3] += ec * f.pNear[d-1]
			mv[4] += ec * f.pFar[d-1]
			if !claimed {
				mv[5] += ec * f.pNear[d-1]
			}
			mv[6] = max(mv[6], pT*f.pMid[d-1])
		}
	}
	dst[uTotal] = total / float64(f.sites)
}
