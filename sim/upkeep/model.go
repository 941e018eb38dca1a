package upkeep

import (
	"encoding/binary"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"

	"baton/sim/model"
)

// MaxLevels is the highest L a file may set; it bounds the stack scratch
// Step uses for belief propagation, which is how Step avoids allocating.
const MaxLevels = 8

// maxSites keeps the n*n distance tables and the 2-byte positions in Key sane.
const maxSites = 1000

// State is the fleet's belief state: robot positions and one probability
// vector over levels per site. A site last seen at level l, t steps ago,
// believes row l of P^t: that vector is the model's table row ti[site]
// (built once with Advance's own arithmetic, so it is bit for bit what
// repeated propagation gives). Beliefs the tables do not hold (older than
// the tables, or arbitrary ones set from outside) live in bel (site s owns
// bel[s*(L+1) : (s+1)*(L+1)]) with ti[site] = -1. Copying is three copies
// and nothing allocates.
type State struct {
	pos []int
	ti  []int32
	bel []float64
}

// Model is one configured upkeep instance. It is read-only after
// construction, so many goroutines may step states of one Model at once.
type Model struct {
	n, levels, k int // sites, L, L+1
	robots       int
	names        []string
	xy           [][2]float64
	cost         []float64  // k
	chain        []float64  // n*k*k, site s row i at chain[(s*k+i)*k:]
	chainT       []float64  // the transposes: site s column j at chainT[(s*k+j)*k:]
	band         [][2]uint8 // n*k, nonzero rows [lo,hi) of each column of chainT
	nbr          [][]int    // sorted by site index
	dist         []int      // n*n hop counts
	hop          []int      // n*n control that moves one hop from a toward b (0 if a == b)
	startPos     []int
	startLevel   []int
	threshLevel  int
	threshProb   float64
	discount     float64
	horizon      int
	observeAll   bool
	maxControls  int

	// Belief tables: row ((s*k+l)*ages + t) is site s's belief t steps after
	// it was seen at level l; tabQ its chance of threshold level or worse
	// (summed as Base sums it) and tabEnd whether it is the last age held.
	ages   int
	tab    []float64
	tabQ   []float64
	tabEnd []bool
}

// tableBytes bounds the belief tables (common practice: keep a hot table
// within a core's L2 cache); maxAges caps the ages held, past which a
// site's belief is propagated step by step as before.
const (
	tableBytes = 1 << 20
	maxAges    = 128
	minAges    = 8
)

var (
	_ model.Enumerable     = (*Model)(nil)
	_ model.TerminalCoster = (*Model)(nil)
	_ model.ControlNamer   = (*Model)(nil)
)

// spec is a validated instance description; Parse and RandomTiny both build
// one so there is a single constructor.
type spec struct {
	levels      int
	cost        []float64
	names       []string
	xy          [][2]float64
	chains      [][]float64 // per site, k*k
	roads       [][2]int
	startPos    []int
	startLevel  []int
	threshLevel int
	threshProb  float64
	discount    float64
	horizon     int
	observeAll  bool
}

// build assumes sp is valid (connected graph, stochastic rows, ...).
func build(sp *spec) *Model {
	n, k := len(sp.names), sp.levels+1
	m := &Model{
		n: n, levels: sp.levels, k: k,
		robots:      len(sp.startPos),
		names:       append([]string(nil), sp.names...),
		xy:          append([][2]float64(nil), sp.xy...),
		cost:        append([]float64(nil), sp.cost...),
		chain:       make([]float64, 0, n*k*k),
		nbr:         make([][]int, n),
		startPos:    append([]int(nil), sp.startPos...),
		startLevel:  append([]int(nil), sp.startLevel...),
		threshLevel: sp.threshLevel,
		threshProb:  sp.threshProb,
		discount:    sp.discount,
		horizon:     sp.horizon,
		observeAll:  sp.observeAll,
	}
	for _, c := range sp.chains {
		m.chain = append(m.chain, c...)
	}
	m.chainT = make([]float64, n*k*k)
	m.band = make([][2]uint8, n*k)
	for s := range n {
		for j := range k {
			lo, hi := k, 0
			for i := range k {
				v := m.chain[(s*k+i)*k+j]
				m.chainT[(s*k+j)*k+i] = v
				if v != 0 {
					lo, hi = min(lo, i), i+1
				}
			}
			if hi == 0 {
				lo = 0 // a level nothing moves into
			}
			m.band[s*k+j] = [2]uint8{uint8(lo), uint8(hi)}
		}
	}
	for _, r := range sp.roads {
		m.nbr[r[0]] = append(m.nbr[r[0]], r[1])
		m.nbr[r[1]] = append(m.nbr[r[1]], r[0])
	}
	for s := range m.nbr {
		sortInts(m.nbr[s])
		m.maxControls = max(m.maxControls, len(m.nbr[s])+1)
	}
	m.buildTables()
	m.dist = allPairsBFS(m.nbr)
	m.hop = make([]int, n*n)
	for a := range n {
		for b := range n {
			if a == b {
				continue
			}
			// Fixed tie rule: the lowest-index neighbour on a shortest path;
			// neighbours are sorted, so the first hit is that one.
			for i, v := range m.nbr[a] {
				if m.dist[v*n+b] == m.dist[a*n+b]-1 {
					m.hop[a*n+b] = i + 1
					break
				}
			}
		}
	}
	return m
}

// buildTables fills the belief tables by running wear on each point mass,
// the very code Advance runs on an explicit belief, so a tabled belief and
// a propagated one are the same bits. Too many sites or levels for
// tableBytes leaves the tables off.
func (m *Model) buildTables() {
	n, k := m.n, m.k
	ages := min(maxAges, tableBytes/(8*(k+2)*n*k))
	if ages < minAges {
		return
	}
	m.ages = ages
	rows := n * k * ages
	m.tab = make([]float64, rows*k)
	m.tabQ = make([]float64, rows)
	m.tabEnd = make([]bool, rows)
	var cur, next [MaxLevels + 1]float64
	for s := range n {
		for l := range k {
			clear(cur[:k])
			cur[l] = 1
			for t := range ages {
				i := (s*k+l)*ages + t
				copy(m.tab[i*k:i*k+k], cur[:k])
				m.tabQ[i] = m.tailProb(cur[:k])
				m.tabEnd[i] = t == ages-1
				m.wear(s, cur[:k], next[:k])
				cur = next
			}
		}
	}
}

// wear is one step of site's chain on belief b: out(j) = sum_i b(i) P(i,j)
// over the band of column j's nonzero rows (a birth chain has two), summed
// in a register; skipped terms are exact zeros, so this is the full
// product bit for bit. out must not alias b.
func (m *Model) wear(site int, b, out []float64) {
	k := m.k
	pt := m.chainT[site*k*k : (site+1)*k*k]
	band := m.band[site*k : site*k+k]
	for j := range out {
		col := pt[j*k : j*k+k]
		acc := 0.0
		for i := int(band[j][0]); i < int(band[j][1]); i++ {
			acc += b[i] * col[i]
		}
		out[j] = acc
	}
}

// tailProb is P(level >= threshold level) under b, summed in level order.
func (m *Model) tailProb(b []float64) float64 {
	q := 0.0
	for _, v := range b[m.threshLevel:] {
		q += v
	}
	return q
}

// belief is site's probability vector in st, read-only (it may be a table
// row shared by every state).
func (m *Model) belief(st *State, site int) []float64 {
	if i := int(st.ti[site]); i >= 0 {
		return m.tab[i*m.k : i*m.k+m.k]
	}
	return st.bel[site*m.k : site*m.k+m.k]
}

// WithoutTables is m with the belief tables off: every belief propagated
// step by step, as before they existed. The same decisions, bit for bit;
// it is there to measure what the tables save (sim bench search). States
// are not shared between the two: each model steps states it made.
func (m *Model) WithoutTables() *Model {
	out := *m
	out.ages, out.tab, out.tabQ, out.tabEnd = 0, nil, nil, nil
	return &out
}

// rowOf finds the table row holding exactly b for site (the youngest age
// that does), or -1: a belief that came over the wire rejoins the tables.
func (m *Model) rowOf(site int, b []float64) int32 {
	k := m.k
	for t := range m.ages {
		for l := range k {
			i := (site*k+l)*m.ages + t
			if slices.Equal(m.tab[i*k:i*k+k], b) {
				return int32(i)
			}
		}
	}
	return -1
}

func sortInts(a []int) {
	for i := 1; i < len(a); i++ {
		for j := i; j > 0 && a[j] < a[j-1]; j-- {
			a[j], a[j-1] = a[j-1], a[j]
		}
	}
}

// allPairsBFS returns hop counts, -1 where unreachable.
func allPairsBFS(nbr [][]int) []int {
	n := len(nbr)
	dist := make([]int, n*n)
	for i := range dist {
		dist[i] = -1
	}
	queue := make([]int, 0, n)
	for src := range n {
		d := dist[src*n : (src+1)*n]
		d[src] = 0
		queue = append(queue[:0], src)
		for len(queue) > 0 {
			a := queue[0]
			queue = queue[1:]
			for _, v := range nbr[a] {
				if d[v] < 0 {
					d[v] = d[a] + 1
					queue = append(queue, v)
				}
			}
		}
	}
	return dist
}

// Name implements model.Model.
func (m *Model) Name() string { return "upkeep" }

// Robots implements model.Model.
func (m *Model) Robots() int { return m.robots }

// MaxControls is the highest degree plus one.
func (m *Model) MaxControls() int { return m.maxControls }

// NewState allocates a zeroed *State.
func (m *Model) NewState() model.State {
	// A cache line of nothing on both sides of what a step writes, so
	// rollout workers, each stepping a state of its own, never write the
	// same line.
	nb := m.n * m.k
	st := &State{
		pos: make([]int, m.robots+16)[8 : 8+m.robots : 8+m.robots],
		ti:  make([]int32, m.n+32)[16 : 16+m.n : 16+m.n],
		bel: make([]float64, nb+16)[8 : 8+nb : 8+nb],
	}
	for i := range st.ti {
		st.ti[i] = -1
	}
	return st
}

// CopyState copies src into dst.
func (m *Model) CopyState(dst, src model.State) {
	d, s := dst.(*State), src.(*State)
	copy(d.pos, s.pos)
	copy(d.ti, s.ti)
	copy(d.bel, s.bel)
}

// Start puts the robots on their start sites and makes every site's belief
// a point mass at its configured initial level; rng is not used.
func (m *Model) Start(dst model.State, _ *rand.Rand) {
	st := dst.(*State)
	copy(st.pos, m.startPos)
	for s, l := range m.startLevel {
		m.point(st, s, l)
	}
}

// NumControls is deg(site of r) + 1.
func (m *Model) NumControls(s model.State, r int) int {
	return len(m.nbr[s.(*State).pos[r]]) + 1
}

// Terminal is always false: the problem is discounted.
func (m *Model) Terminal(model.State) bool { return false }

// Discount is the configured discount factor in (0,1).
func (m *Model) Discount() float64 { return m.discount }

// Horizon is the configured episode length.
func (m *Model) Horizon() int { return m.horizon }

func (m *Model) point(st *State, site, level int) {
	if m.ages > 0 {
		st.ti[site] = int32((site*m.k + level) * m.ages)
		return
	}
	st.ti[site] = -1
	b := st.bel[site*m.k : (site+1)*m.k]
	for i := range b {
		b[i] = 0
	}
	b[level] = 1
}

// Advance applies steps 1-4 of Step (service, cost, wear, moves) without the
// observation and returns the stage cost. Controls out of range panic.
func (m *Model) Advance(s model.State, u []int) float64 {
	st := s.(*State)
	k := m.k
	for r, c := range u {
		if c == 0 {
			m.point(st, st.pos[r], 0)
		}
	}
	cost := 0.0
	for site := range m.n {
		// The stage cost is taken here, after servicing and before wear;
		// this is ExpectedCost fused into the wear loop.
		if i := int(st.ti[site]); i >= 0 {
			row := m.tab[i*k : i*k+k]
			for l, q := range row {
				cost += q * m.cost[l]
			}
			if !m.tabEnd[i] {
				st.ti[site]++ // one step older: the next row
				continue
			}
			// Older than the tables: propagate from here on.
			st.ti[site] = -1
			m.wear(site, row, st.bel[site*k:site*k+k])
			continue
		}
		b := st.bel[site*k : site*k+k]
		for l, q := range b {
			cost += q * m.cost[l]
		}
		var tmp [MaxLevels + 1]float64
		m.wear(site, b, tmp[:k])
		for j := range b {
			b[j] = tmp[j] // a loop, not copy: no memmove call for 4 words
		}
	}
	for r, c := range u {
		if c != 0 {
			st.pos[r] = m.nbr[st.pos[r]][c-1]
		}
	}
	return cost
}

// Step implements model.Model; see the package comment for the order of
// events. It draws exactly one uniform per site, in site order.
func (m *Model) Step(s model.State, u []int, rng *rand.Rand) float64 {
	st := s.(*State)
	cost := m.Advance(st, u)
	// A site no robot's bit is set for is surely unobserved: most sites,
	// found without scanning the robots.
	var near uint64
	for _, p := range st.pos {
		near |= 1 << (p & 63)
	}
	for site := range m.n {
		x := rng.Float64()
		if !m.observeAll && (near&(1<<(site&63)) == 0 || !m.observed(st, site)) {
			continue
		}
		m.point(st, site, m.sample(m.belief(st, site), x))
	}
	return cost
}

// sample inverts the belief's distribution function at x; only levels with
// positive probability can come out, even when rounding leaves the total a
// hair below 1 (then the last positive level takes the remainder).
func (m *Model) sample(b []float64, x float64) int {
	c, last := 0.0, 0
	for l, q := range b {
		if q <= 0 {
			continue
		}
		c += q
		last = l
		if x < c {
			return l
		}
	}
	return last
}

func (m *Model) observed(st *State, site int) bool {
	if m.observeAll {
		return true
	}
	for _, p := range st.pos {
		if p == site {
			return true
		}
	}
	return false
}

// Observed reports whether site is seen in s: a robot stands on it, or the
// instance observes every site.
func (m *Model) Observed(s model.State, site int) bool { return m.observed(s.(*State), site) }

// Observe collapses site's belief to a point mass at level, for a world that
// knows the true levels. It panics on a site or level out of range.
func (m *Model) Observe(s model.State, site, level int) {
	if site < 0 || site >= m.n || level < 0 || level > m.levels {
		panic(fmt.Sprintf("upkeep: Observe(site %d, level %d) out of range", site, level))
	}
	m.point(s.(*State), site, level)
}

// SetBelief sets site's belief in s to a copy of b (L+1 probabilities; not
// checked: for tests and tools that build states by hand).
func (m *Model) SetBelief(s model.State, site int, b []float64) {
	st := s.(*State)
	st.ti[site] = -1
	copy(st.bel[site*m.k:(site+1)*m.k], b)
}

// ExpectedCost is sum_s sum_l b_s(l)*cost[l] in s as it stands.
func (m *Model) ExpectedCost(s model.State) float64 {
	st := s.(*State)
	total := 0.0
	for site := range m.n {
		for l, q := range m.belief(st, site) {
			total += q * m.cost[l]
		}
	}
	return total
}

// tail is site's P(level >= threshold level) in st.
func (m *Model) tail(st *State, site int) float64 {
	if i := st.ti[site]; i >= 0 {
		return m.tabQ[i]
	}
	return m.tailProb(st.bel[site*m.k : site*m.k+m.k])
}

// dueMax bounds the due sites BaseAll lists on the stack.
const dueMax = 32

var _ model.JointBaser = (*Model)(nil)

// BaseAll is Base for every robot, the sites due for service found once
// for the fleet rather than once per robot (each robot then weighs only
// those, in index order, by Base's rule).
func (m *Model) BaseAll(s model.State, u []int) {
	st := s.(*State)
	var due [dueMax]int32
	var dq [dueMax]float64
	nd := 0
	for site := range m.n {
		q := m.tail(st, site)
		if q <= m.threshProb {
			continue
		}
		if nd == dueMax {
			for r := range u {
				u[r] = m.Base(s, r)
			}
			return
		}
		due[nd], dq[nd] = int32(site), q
		nd++
	}
	n := m.n
	for r := range u {
		at := st.pos[r]
		if m.belief(st, at)[0] == 0 {
			u[r] = 0
			continue
		}
		best, bestD, bestP := -1, 0, 0.0
		d := m.dist[at*n : (at+1)*n]
		for i := range nd {
			if site, q := int(due[i]), dq[i]; nearer(best, d[site], q, bestD, bestP) {
				best, bestD, bestP = site, d[site], q
			}
		}
		u[r] = 0
		if best >= 0 {
			u[r] = m.hop[at*n+best]
		}
	}
}

// nearer is Base's rule for a due site at distance d with tail probability
// q against the best so far (none when best < 0): nearer wins, then more
// likely. Sites are offered in index order, so on a full tie the lower
// index wins by staying.
func nearer(best, d int, q float64, bestD int, bestP float64) bool {
	return best < 0 || d < bestD || (d == bestD && q > bestP)
}

// Base is the base policy; see the package comment.
func (m *Model) Base(s model.State, r int) int {
	st := s.(*State)
	n, at := m.n, st.pos[r]
	if m.belief(st, at)[0] == 0 {
		return 0
	}
	best, bestD, bestP := -1, 0, 0.0
	d := m.dist[at*n : (at+1)*n]
	for site := range n {
		q := m.tail(st, site)
		if q <= m.threshProb {
			continue
		}
		if nearer(best, d[site], q, bestD, bestP) {
			best, bestD, bestP = site, d[site], q
		}
	}
	if best < 0 {
		return 0
	}
	return m.hop[at*n+best]
}

// TerminalCost is the current expected stage cost held for ever,
// ExpectedCost/(1-a).
func (m *Model) TerminalCost(s model.State) float64 {
	return m.ExpectedCost(s) / (1 - m.discount)
}

// ControlName is "service" for 0 and "to <site>" for a move.
func (m *Model) ControlName(s model.State, r, c int) string {
	if c == 0 {
		return "service"
	}
	nb := m.nbr[s.(*State).pos[r]]
	if c < 0 || c > len(nb) {
		return fmt.Sprintf("control %d (invalid)", c)
	}
	return "to " + m.names[nb[c-1]]
}

// Key encodes positions (2 bytes each) and the exact bits of every belief
// entry; robots are distinguishable, so nothing is merged.
func (m *Model) Key(s model.State) string {
	st := s.(*State)
	buf := make([]byte, 0, 2*len(st.pos)+8*len(st.bel))
	for _, p := range st.pos {
		buf = binary.LittleEndian.AppendUint16(buf, uint16(p))
	}
	for site := range m.n {
		for _, q := range m.belief(st, site) {
			if q == 0 {
				q = 0 // fold -0 into +0
			}
			buf = binary.LittleEndian.AppendUint64(buf, math.Float64bits(q))
		}
	}
	return string(buf)
}

// Outcomes enumerates the observation outcomes of one step: for every
// observed site, every level with positive probability, in product. The
// beliefs are computed by the same code as Step, so Step's next states have
// exactly these keys. It allocates (scratch states); it is for the exact
// tools, not the rollout hot path.
func (m *Model) Outcomes(s model.State, u []int, fn func(next model.State, p, cost float64)) {
	pre := m.NewState().(*State)
	m.CopyState(pre, s)
	cost := m.Advance(pre, u)
	next := m.NewState().(*State)
	m.CopyState(next, pre)
	var obs []int
	for site := range m.n {
		if m.observed(pre, site) {
			obs = append(obs, site)
		}
	}
	var rec func(i int, p float64)
	rec = func(i int, p float64) {
		if i == len(obs) {
			fn(next, p, cost)
			return
		}
		site := obs[i]
		for l, q := range m.belief(pre, site) {
			if q > 0 {
				m.point(next, site, l)
				rec(i+1, p*q)
			}
		}
	}
	rec(0, 1)
}

// NumSites is the number of sites.
func (m *Model) NumSites() int { return m.n }

// Levels is L, the highest wear level.
func (m *Model) Levels() int { return m.levels }

// SiteName is the name of site i.
func (m *Model) SiteName(i int) string { return m.names[i] }

// SiteIndex finds a site by name.
func (m *Model) SiteIndex(name string) (int, bool) {
	for i, s := range m.names {
		if s == name {
			return i, true
		}
	}
	return -1, false
}

// SiteXY is site i's map position, for drawing.
func (m *Model) SiteXY(i int) (x, y float64) { return m.xy[i][0], m.xy[i][1] }

// Neighbours are the sites one road from i, sorted by index (the order of
// controls 1..deg).
func (m *Model) Neighbours(i int) []int { return m.nbr[i] }

// Distance is the hop count between sites a and b.
func (m *Model) Distance(a, b int) int { return m.dist[a*m.n+b] }

// LevelCost is the stage cost of one site at level l.
func (m *Model) LevelCost(l int) float64 { return m.cost[l] }

// Transition is P_site(from -> to), for a world that draws true wear.
func (m *Model) Transition(site, from, to int) float64 {
	return m.chain[(site*m.k+from)*m.k+to]
}

// ObserveAll reports whether every site is observed every step.
func (m *Model) ObserveAll() bool { return m.observeAll }

// Position is robot r's site in s (int32, as model.Fleet has it on the wire).
func (m *Model) Position(s model.State, r int) int32 { return int32(s.(*State).pos[r]) }

// Positions is the robots' sites in s; it aliases s, do not modify it.
func (m *Model) Positions(s model.State) []int { return s.(*State).pos }

// Belief is site's probability vector over levels 0..L in s. It is
// read-only: it aliases s or a table every state shares (SetBelief writes).
func (m *Model) Belief(s model.State, site int) []float64 {
	return m.belief(s.(*State), site)
}

// WithStarts is m with robot r starting at site starts[r] (by name), one
// per robot; the model itself is shared (it is read-only).
func (m *Model) WithStarts(starts []string) (*Model, error) {
	if len(starts) != m.robots {
		return nil, fmt.Errorf("%d start sites for %d robots", len(starts), m.robots)
	}
	out := *m
	out.startPos = make([]int, len(starts))
	for r, name := range starts {
		i := slices.Index(m.names, name)
		if i < 0 {
			return nil, fmt.Errorf("robot %d: no site named %q", r, name)
		}
		out.startPos[r] = i
	}
	return &out, nil
}
