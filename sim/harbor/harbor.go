// Package harbor is the fully observed scenario: skimmer boats collect oil
// slicks that drift on a W x H grid.
//
// One step, in this order:
//  1. every boat moves one cell (N, S, E, W) or holds; a move off the grid
//     leaves it where it is;
//  2. every slick on a cell where a boat now is gets collected;
//  3. the stage cost is the number of slicks still uncollected;
//  4. each remaining slick drifts: with probability Drift it moves to a
//     neighbouring cell, the direction drawn with weight 1 per direction
//     plus CurrentBias for the current's direction; a drift off the grid
//     leaves it in place.
//
// The episode ends when every slick is collected (cost-free absorbing state)
// or after Horizon steps. By default all boats launch from one dock cell:
// that is the usual site layout, and the case where boats that do not
// coordinate all chase the same slick.
//
// # Files
//
// A harbor file sets Config's fields in YAML (deploy/examples/harbor-tiny.yaml)
// and is read through sim/config: at most config.MaxFileBytes, parsed in at
// most config.AllocPerByte bytes per input byte plus config.AllocFixed (the
// model itself is a few hundred bytes, plus coordinate tables of at most
// 256 kB for grids up to 65536 cells), problems reported as
// "FILE:LINE: FIELD: message". Every size the file sets is bounded: a grid
// of at most 1000 x 1000 cells, at most 256 boats (and so launch cells),
// at most 1000 slicks (and so slick cells), at most 100000 steps.
package harbor

import (
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strings"

	"baton/sim/model"
)

// Controls of every boat. Hold is 0, as model requires.
const (
	Hold = iota
	North
	South
	East
	West
	numControls
)

// Control 0 is "stay" (stay on the cell): never "hold", which is the
// runtime's word for "no valid decision".
var controlNames = [numControls]string{"stay", "N", "S", "E", "W"}

// Direction deltas; y grows northwards.
var dx = [numControls]int{0, 0, 0, 1, -1}
var dy = [numControls]int{0, 1, -1, 0, 0}

// Model is one configured harbor.
type Model struct {
	cfg  Config
	w, h int
	// xy holds each cell's coordinates, x | y<<16, one load for both
	// (grids up to tableCells), and step[u] the cell offset of control u:
	// the hot paths (Base, moves, distances) then divide nothing.
	xy      []uint32
	step    [numControls]int32
	drift   float64
	cumDir  [4]float64 // cumulative direction weights N,S,E,W, normalised to 1
	dirCut  [4]float64 // divCut(drift, cumDir[i]): r < dirCut[i] iff r/drift < cumDir[i]
	current int        // index into N,S,E,W of the current, or -1
}

// State is the harbor's full state.
type State struct {
	Boats  []int32 // cell of each boat (y*W + x)
	Slicks []int32 // cell of each slick, -1 once collected
	Left   int     // uncollected slicks
}

var _ model.Enumerable = (*Model)(nil)
var _ model.TerminalCoster = (*Model)(nil)
var _ model.ControlNamer = (*Model)(nil)

// New builds a model from a validated configuration.
func New(cfg Config) (*Model, error) {
	if err := cfg.Validate(nil); err != nil {
		return nil, err
	}
	return newModel(cfg), nil
}

func newModel(cfg Config) *Model {
	m := &Model{cfg: cfg, w: cfg.Width, h: cfg.Height, drift: cfg.Drift, current: -1}
	if m.w*m.h <= tableCells {
		m.xy = make([]uint32, m.w*m.h)
		for c := range m.xy {
			m.xy[c] = uint32(c%m.w) | uint32(c/m.w)<<16
		}
	}
	for u := range m.step {
		m.step[u] = int32(dx[u] + dy[u]*m.w)
	}
	wts := [4]float64{1, 1, 1, 1}
	if cfg.Current != "" {
		m.current = strings.Index("NSEW", cfg.Current)
		wts[m.current] += cfg.CurrentBias
	}
	sum := wts[0] + wts[1] + wts[2] + wts[3]
	acc := 0.0
	for i, w := range wts {
		acc += w / sum
		m.cumDir[i] = acc
	}
	m.cumDir[3] = 1
	if m.drift > 0 {
		for i, c := range m.cumDir {
			m.dirCut[i] = divCut(m.drift, c)
		}
	}
	return m
}

// divCut is the least r >= 0 with r/d >= c in floating point (or the float
// after d when no r <= d has it). Division is monotone, so r/d < c exactly
// when r < divCut(d, c): Step picks a drift direction with the same
// outcome as dividing, without the division. Found by bisection over the
// float64 bit patterns, which order non-negative floats.
func divCut(d, c float64) float64 {
	lo, hi := uint64(0), math.Float64bits(d)+1
	for lo < hi {
		mid := lo + (hi-lo)/2
		if math.Float64frombits(mid)/d >= c {
			hi = mid
		} else {
			lo = mid + 1
		}
	}
	return math.Float64frombits(lo)
}

// Config returns the configuration the model was built from.
func (m *Model) Config() Config { return m.cfg }

func (m *Model) Name() string      { return "harbor" }
func (m *Model) Robots() int       { return m.cfg.Robots }
func (m *Model) MaxControls() int  { return numControls }
func (m *Model) Discount() float64 { return m.cfg.Discount }
func (m *Model) Horizon() int      { return m.cfg.Horizon }
func (m *Model) Width() int        { return m.w }
func (m *Model) Height() int       { return m.h }

// Cell is the index of (x, y).
func (m *Model) Cell(x, y int) int32 { return int32(y*m.w + x) }

// XY is the inverse of Cell.
func (m *Model) XY(c int32) (x, y int) {
	if m.xy != nil {
		v := m.xy[c]
		return int(v & 0xffff), int(v >> 16)
	}
	return int(c) % m.w, int(c) / m.w
}

// tableCells bounds the grids whose coordinates are tabled (256 kB of
// tables): the harbors sites use are far smaller, and a file's model stays
// within the loader's documented allocation bound.
const tableCells = 1 << 16

func (m *Model) NewState() model.State {
	// A cache line of nothing on both sides of what a step writes (the
	// counts and the cells), so rollout workers, each stepping a state of
	// its own, never write the same line.
	p := &paddedState{}
	nb, ns := m.cfg.Robots, m.cfg.Slicks
	buf := make([]int32, 16+nb+ns+16)
	p.s.Boats, p.s.Slicks = buf[16:16+nb:16+nb], buf[16+nb:16+nb+ns:16+nb+ns]
	return &p.s
}

type paddedState struct {
	_ [64]byte
	s State
	_ [64]byte
}

func (m *Model) CopyState(dst, src model.State) {
	d, s := dst.(*State), src.(*State)
	copy(d.Boats, s.Boats)
	copy(d.Slicks, s.Slicks)
	d.Left = s.Left
}

// Start places boats at the dock (or their configured or scattered cells)
// and slicks at their configured cells or, when none are configured, at
// random cells that hold no boat.
func (m *Model) Start(dst model.State, rng *rand.Rand) {
	s := dst.(*State)
	cells := m.w * m.h
	switch {
	case len(m.cfg.Starts) > 0:
		for i, p := range m.cfg.Starts {
			s.Boats[i] = m.Cell(p[0], p[1])
		}
	case m.cfg.Scatter:
		for i := range s.Boats {
			s.Boats[i] = int32(rng.IntN(cells))
		}
	default:
		for i := range s.Boats {
			s.Boats[i] = m.Cell(m.cfg.Dock[0], m.cfg.Dock[1])
		}
	}
	if len(m.cfg.SlickCells) > 0 {
		for i, p := range m.cfg.SlickCells {
			s.Slicks[i] = m.Cell(p[0], p[1])
		}
	} else {
		// Uniform over the cells without a boat (by rejection); when boats
		// cover every cell (a tiny harbor), over all cells, and such a
		// slick is collected at once.
		free := false
		for c := range cells {
			free = free || !slices.Contains(s.Boats, int32(c))
		}
		for i := range s.Slicks {
			for {
				c := int32(rng.IntN(cells))
				if !free || !slices.Contains(s.Boats, c) {
					s.Slicks[i] = c
					break
				}
			}
		}
	}
	s.Left = len(s.Slicks)
	m.collect(s)
}

func (m *Model) NumControls(model.State, int) int { return numControls }

func (m *Model) Terminal(st model.State) bool { return st.(*State).Left == 0 }

// move returns the cell reached from c by control u (clamped to the grid).
func (m *Model) move(c int32, u int) int32 {
	x, y := m.XY(c)
	x, y = x+dx[u], y+dy[u]
	if x < 0 || x >= m.w || y < 0 || y >= m.h {
		return c
	}
	return c + m.step[u]
}

func (m *Model) collect(s *State) {
	// A slick whose cell's bit no boat sets has no boat on it: most, found
	// without scanning the fleet.
	var near uint64
	for _, b := range s.Boats {
		near |= 1 << (b & 63)
	}
	for i, c := range s.Slicks {
		if c >= 0 && near&(1<<(c&63)) != 0 && slices.Contains(s.Boats, c) {
			s.Slicks[i] = -1
			s.Left--
		}
	}
}

// Step is steps 1-3 (advance, shared with Advance) followed by the drift.
// It draws exactly one uniform per slick (collected or not), in slick
// order, so a given rng stream gives each slick the same drift whatever the
// boats do: that is what makes common random numbers effective.
func (m *Model) Step(st model.State, u []int, rng *rand.Rand) float64 {
	s := st.(*State)
	if s.Left == 0 {
		return 0
	}
	cost := m.advance(s, u)
	for i, c := range s.Slicks {
		r := rng.Float64()
		if c < 0 || r >= m.drift {
			continue
		}
		s.Slicks[i] = m.move(c, m.driftDirection(r))
	}
	return cost
}

// driftDirection is direction(r/drift) for a uniform r < drift, by the
// precomputed cuts.
func (m *Model) driftDirection(r float64) int {
	for i, c := range m.dirCut {
		if r < c {
			return North + i
		}
	}
	return West
}

// direction maps a uniform in [0,1) to N, S, E or W by the current's weights.
func (m *Model) direction(r float64) int {
	for i, c := range m.cumDir {
		if r < c {
			return North + i
		}
	}
	return West
}

func (m *Model) dist(a, b int32) int {
	ax, ay := m.XY(a)
	bx, by := m.XY(b)
	return abs(ax-bx) + abs(ay-by)
}

func abs(v int) int {
	if v < 0 {
		return -v
	}
	return v
}

// Base heads for the nearest uncollected slick by Manhattan distance (ties:
// the lower cell index), moving east/west first until the column matches,
// then north/south. With no slick left it holds.
func (m *Model) Base(st model.State, r int) int {
	s := st.(*State)
	b := s.Boats[r]
	bx, by := m.XY(b)
	best := noSlick
	for _, c := range s.Slicks {
		if c < 0 {
			continue
		}
		cx, cy := m.XY(c)
		best = min(best, nearKey(iabs(cx-bx)+iabs(cy-by), c))
	}
	if best == noSlick {
		return Hold
	}
	return m.Toward(b, int32(best&keyCell))
}

var _ model.Aliaser = (*Model)(nil)

// Alias is Hold for a move off the grid (move leaves the boat where it is)
// and c otherwise: no two moves that go somewhere reach the same cell.
func (m *Model) Alias(st model.State, r, c int) int {
	if b := st.(*State).Boats[r]; c != Hold && m.move(b, c) == b {
		return Hold
	}
	return c
}

var _ model.JointBaser = (*Model)(nil)

// liveSlicks bounds the live slicks BaseAll gathers on the stack; with more,
// it takes Base boat by boat, the same controls.
const liveSlicks = 16

// BaseAll is Base for every boat: the live slicks' coordinates gathered
// once rather than looked up once per boat, and a boat on the same cell as
// the one before it taking its control (fleets leave a dock together).
func (m *Model) BaseAll(st model.State, u []int) {
	s := st.(*State)
	var sx, sy [liveSlicks]int
	var sc [liveSlicks]int32
	n := 0
	for _, c := range s.Slicks {
		if c < 0 {
			continue
		}
		if n == liveSlicks {
			for r := range u {
				u[r] = m.Base(s, r)
			}
			return
		}
		sx[n], sy[n] = m.XY(c)
		sc[n] = c
		n++
	}
	for r, b := range s.Boats {
		if r > 0 && b == s.Boats[r-1] {
			u[r] = u[r-1]
			continue
		}
		bx, by := m.XY(b)
		best := noSlick
		for i := range n {
			best = min(best, nearKey(iabs(sx[i]-bx)+iabs(sy[i]-by), sc[i]))
		}
		u[r] = Hold
		if best != noSlick {
			tx, ty := m.XY(int32(best & keyCell))
			u[r] = toward(bx, by, tx, ty)
		}
	}
}

// nearKey orders slicks as Base's rule does, nearer first and then the
// lower cell, in one integer, so the nearest is a branch-free min.
func nearKey(d int, c int32) int { return d<<32 | int(c) }

const (
	keyCell = 1<<32 - 1
	noSlick = 1<<62 - 1
)

// iabs is |v| without a branch (the sign is unpredictable in these loops).
func iabs(v int) int {
	s := v >> 63
	return (v ^ s) - s
}

// Distance is the grid (Manhattan) distance between cells a and b.
func (m *Model) Distance(a, b int32) int { return m.dist(a, b) }

// Toward is the control that takes a boat at cell from one step toward cell
// to: east/west first until the column matches, then north/south; Hold
// when it is there.
func (m *Model) Toward(from, to int32) int {
	bx, by := m.XY(from)
	tx, ty := m.XY(to)
	return toward(bx, by, tx, ty)
}

func toward(bx, by, tx, ty int) int {
	switch {
	case tx > bx:
		return East
	case tx < bx:
		return West
	case ty > by:
		return North
	case ty < by:
		return South
	}
	return Hold
}

// TerminalCost estimates the cost still to come where a rollout truncates:
// each slick is assumed to wait as many steps as its nearest boat is away
// (a heuristic: it ignores drift and boats serving several slicks).
func (m *Model) TerminalCost(st model.State) float64 {
	s := st.(*State)
	total := 0
	for _, c := range s.Slicks {
		if c < 0 {
			continue
		}
		d := 1 << 30
		for _, b := range s.Boats {
			d = min(d, m.dist(b, c))
		}
		total += d
	}
	return float64(total)
}

func (m *Model) ControlName(_ model.State, _ int, c int) string {
	if c < 0 || c >= numControls {
		return fmt.Sprintf("control-%d", c)
	}
	return controlNames[c]
}

// Key encodes boats in order and the uncollected slicks as a sorted multiset
// (slicks are indistinguishable, which shrinks the exact state space).
func (m *Model) Key(st model.State) string {
	s := st.(*State)
	buf := make([]byte, 0, 4*(len(s.Boats)+len(s.Slicks))+1)
	for _, b := range s.Boats {
		buf = append(buf, byte(b), byte(b>>8))
	}
	buf = append(buf, '|')
	sl := make([]int32, 0, len(s.Slicks))
	for _, c := range s.Slicks {
		if c >= 0 {
			sl = append(sl, c)
		}
	}
	slices.Sort(sl)
	for _, c := range sl {
		buf = append(buf, byte(c), byte(c>>8))
	}
	return string(buf)
}

// Outcomes enumerates every combination of slick drifts.
func (m *Model) Outcomes(st model.State, u []int, fn func(next model.State, p, cost float64)) {
	s := st.(*State)
	if s.Left == 0 {
		return
	}
	next := m.NewState().(*State)
	m.CopyState(next, s)
	cost := m.advance(next, u)
	probs := [4]float64{}
	prev := 0.0
	for i, c := range m.cumDir {
		probs[i] = c - prev
		prev = c
	}
	var rec func(i int, p float64)
	rec = func(i int, p float64) {
		if i == len(next.Slicks) {
			fn(next, p, cost)
			return
		}
		c := next.Slicks[i]
		if c < 0 || m.drift == 0 {
			rec(i+1, p)
			return
		}
		// Moves that bump the edge merge into "stays".
		stay := 1 - m.drift
		for d := range 4 {
			if m.move(c, North+d) == c {
				stay += m.drift * probs[d]
			}
		}
		rec(i+1, p*stay)
		for d := range 4 {
			if to := m.move(c, North+d); to != c {
				next.Slicks[i] = to
				rec(i+1, p*m.drift*probs[d])
			}
		}
		next.Slicks[i] = c
	}
	rec(0, 1)
}

// Render draws the state as text: B boat, o slick, * both, . water.
func (m *Model) Render(st model.State) string {
	s := st.(*State)
	var sb strings.Builder
	for y := m.h - 1; y >= 0; y-- {
		for x := 0; x < m.w; x++ {
			c := m.Cell(x, y)
			boat, slick := slices.Contains(s.Boats, c), slices.Contains(s.Slicks, c)
			switch {
			case boat && slick:
				sb.WriteByte('*')
			case boat:
				sb.WriteByte('B')
			case slick:
				sb.WriteByte('o')
			default:
				sb.WriteByte('.')
			}
		}
		sb.WriteByte('\n')
	}
	return sb.String()
}
