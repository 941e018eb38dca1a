package auction

import (
	"errors"
	"fmt"
	"math"
	"slices"
	"sync/atomic"

	"baton/agentd/decide"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// Config sets the auction the policy runs at every state.
type Config struct {
	// Lambda is the time-discounted reward's discount per step of travel,
	// in (0,1); 0 means 0.9, a common choice in examples, not a value taken
	// from the paper.
	Lambda float64
	// Bundle is the most targets one robot takes, 1..MaxBundle (0: 2). A
	// robot only acts on its first target, but a second lets its bid for
	// the first count what it would serve next.
	Bundle int
	// Range > 0: robots hear each other when they are at most Range apart
	// in the scenario's distance (harbor: grid steps; upkeep: roads),
	// recomputed at every state. 0: everyone hears everyone.
	Range int
	// Graph, when set, is a fixed communication graph: Graph[r] lists the
	// robots r hears. It takes precedence over Range.
	Graph [][]int
	// MaxRounds caps each auction (0: DefaultMaxRounds).
	MaxRounds int
}

func (c Config) withDefaults() Config {
	if c.Lambda == 0 {
		c.Lambda = 0.9
	}
	if c.Bundle == 0 {
		c.Bundle = 2
	}
	return c
}

func (c Config) validate(robots int) error {
	switch {
	case math.IsNaN(c.Lambda) || c.Lambda <= 0 || c.Lambda >= 1:
		return fmt.Errorf("auction: lambda %v not in (0,1)", c.Lambda)
	case c.Bundle < 1 || c.Bundle > MaxBundle:
		return fmt.Errorf("auction: bundle %d not in 1..%d", c.Bundle, MaxBundle)
	case c.Range < 0:
		return fmt.Errorf("auction: negative range %d", c.Range)
	case c.MaxRounds < 0:
		return fmt.Errorf("auction: negative round cap %d", c.MaxRounds)
	case c.Graph != nil:
		// Solve checks the lists themselves; check them here once, with a
		// stand-in problem, so a bad graph fails at Wrap and not per state.
		p := Problem{Agents: robots, Bundle: 1, Neighbours: c.Graph, Score: func(int, []int, []float64) {}}
		return p.validate()
	}
	return nil
}

// Wrap returns m with the auction as its base policy: Base(x, r) is robot
// r's first step toward the first target of the path CBBA gives it in x
// (harbor: the cells of uncollected slicks, by grid distance, a cell
// worth as many slicks as it holds; upkeep: the sites due for service, by
// road distance, one step of service each, after servicing the robot's
// own site when it is surely worn, as the assignment baseline does). A
// robot with no target holds. When an auction does not settle within its
// round cap the robots follow their paths as they stand; when it cannot
// run at all, the scenario's own base policy.
//
// The wrapped model embeds m, so it stays model.Enumerable for the exact
// tools, and is a model.JointBaser: one auction serves every robot.
func Wrap(m model.Model, cfg Config) (model.Model, error) {
	cfg = cfg.withDefaults()
	if err := cfg.validate(m.Robots()); err != nil {
		return nil, err
	}
	switch m := m.(type) {
	case *harbor.Model:
		// A path is at most Bundle legs of at most Width+Height steps.
		return harborAuction{m, cfg, PowTable(cfg.Lambda, cfg.Bundle*(m.Width()+m.Height())+1), &tally{}}, nil
	case *upkeep.Model:
		far := 0
		for a := range m.NumSites() {
			for b := range m.NumSites() {
				far = max(far, m.Distance(a, b))
			}
		}
		// At most Bundle legs of at most far roads and one service each.
		return upkeepAuction{m, cfg, PowTable(cfg.Lambda, cfg.Bundle*(far+1)+1), &tally{}}, nil
	}
	return nil, fmt.Errorf("auction: no targets known for scenario %s", m.Name())
}

// auctioneer is a wrapped model that can report what its auction cost.
type auctioneer interface {
	model.Model
	auction(s model.State, u []int) (Stats, error)
	troubles() *tally
}

// tally counts the auctions a wrapped model ran as a base policy (rollout
// runs them at every simulated step, on several goroutines) that did not
// settle within their round cap, or could not run at all.
type tally struct{ unsettled, failed atomic.Int64 }

func (t *tally) note(err error) {
	switch {
	case err == nil:
	case errors.Is(err, ErrNotSettled):
		t.unsettled.Add(1)
	default:
		t.failed.Add(1)
	}
}

// Troubles is how many auctions m, a model from Wrap, has run as a base
// policy so far that did not settle within their round cap (the robots
// followed their paths as they stood) and that could not run at all (the
// scenario's own base policy decided); ok is false for any other model.
func Troubles(m model.Model) (unsettled, failed int64, ok bool) {
	a, ok := m.(auctioneer)
	if !ok {
		return 0, 0, false
	}
	return a.troubles().unsettled.Load(), a.troubles().failed.Load(), true
}

type harborAuction struct {
	*harbor.Model
	cfg Config
	pow []float64 // PowTable for the grid's longest paths
	t   *tally
}

func (h harborAuction) Base(s model.State, r int) int {
	u := make([]int, h.Robots())
	h.BaseAll(s, u)
	return u[r]
}

func (h harborAuction) BaseAll(s model.State, u []int) {
	_, err := h.auction(s, u)
	h.t.note(err)
}

func (h harborAuction) troubles() *tally { return h.t }

func (h harborAuction) auction(s model.State, u []int) (Stats, error) {
	st := s.(*harbor.State)
	// Targets are cells, sorted, so the auction depends only on where the
	// slicks are (as the model's Key does) and co-located slicks are one
	// task worth their number.
	cells := make([]int32, 0, st.Left)
	for _, c := range st.Slicks {
		if c >= 0 {
			cells = append(cells, c)
		}
	}
	if len(cells) == 0 {
		for r := range u {
			u[r] = harbor.Hold
		}
		return Stats{}, nil
	}
	slices.Sort(cells)
	reward := make([]float64, 0, len(cells))
	n := 0
	for i, c := range cells {
		if i > 0 && c == cells[n-1] {
			reward[n-1]++
			continue
		}
		cells[n] = c
		reward = append(reward, 1)
		n++
	}
	cells = cells[:n]
	boats := st.Boats
	td := TimeDiscounted{
		Lambda:    h.cfg.Lambda,
		Reward:    reward,
		FromAgent: func(i, j int) float64 { return float64(h.Distance(boats[i], cells[j])) },
		Between:   func(a, b int) float64 { return float64(h.Distance(cells[a], cells[b])) },
		Powers:    h.pow,
	}
	res, err := Solve(Problem{
		Agents: len(boats), Tasks: len(cells), Bundle: h.cfg.Bundle,
		Neighbours: h.cfg.graph(len(boats), func(a, b int) int { return h.Distance(boats[a], boats[b]) }),
		Score:      td.Score, MaxRounds: h.cfg.MaxRounds,
	})
	if res.Paths == nil {
		h.Model.BaseAll(s, u)
		return res.Stats, err
	}
	for r := range u {
		u[r] = harbor.Hold
		if p := res.Paths[r]; len(p) > 0 {
			u[r] = h.Toward(boats[r], cells[p[0]])
		}
	}
	return res.Stats, err
}

type upkeepAuction struct {
	*upkeep.Model
	cfg Config
	pow []float64 // PowTable for the site graph's longest paths
	t   *tally
}

func (k upkeepAuction) Base(s model.State, r int) int {
	u := make([]int, k.Robots())
	k.BaseAll(s, u)
	return u[r]
}

func (k upkeepAuction) BaseAll(s model.State, u []int) {
	_, err := k.auction(s, u)
	k.t.note(err)
}

func (k upkeepAuction) troubles() *tally { return k.t }

func (k upkeepAuction) auction(s model.State, u []int) (Stats, error) {
	pos := k.Positions(s)
	targets := k.DueSites(s, nil)
	var res Result
	var err error
	if len(targets) > 0 {
		// Servicing takes the step spent on the site (control 0).
		service := make([]float64, len(targets))
		for j := range service {
			service[j] = 1
		}
		td := TimeDiscounted{
			Lambda:    k.cfg.Lambda,
			Service:   service,
			FromAgent: func(i, j int) float64 { return float64(k.Distance(pos[i], targets[j])) },
			Between:   func(a, b int) float64 { return float64(k.Distance(targets[a], targets[b])) },
			Powers:    k.pow,
		}
		res, err = Solve(Problem{
			Agents: len(pos), Tasks: len(targets), Bundle: k.cfg.Bundle,
			Neighbours: k.cfg.graph(len(pos), func(a, b int) int { return k.Distance(pos[a], pos[b]) }),
			Score:      td.Score, MaxRounds: k.cfg.MaxRounds,
		})
		if res.Paths == nil {
			k.Model.BaseAll(s, u)
			return res.Stats, err
		}
	}
	for r := range u {
		switch {
		case k.SurelyWorn(s, r):
			u[r] = 0 // service where it stands
		case res.Paths == nil || len(res.Paths[r]) == 0:
			u[r] = 0
		default:
			u[r] = k.Toward(pos[r], targets[res.Paths[r][0]])
		}
	}
	return res.Stats, err
}

// graph is the communication graph for robots whose pairwise distances
// dist gives: the fixed one, robots within Range, or nil (everyone).
func (c Config) graph(n int, dist func(a, b int) int) [][]int {
	switch {
	case c.Graph != nil:
		return c.Graph
	case c.Range <= 0:
		return nil
	}
	nb := make([][]int, n)
	for a := range n {
		for b := range n {
			if a != b && dist(a, b) <= c.Range {
				nb[a] = append(nb[a], b)
			}
		}
	}
	return nb
}

// Policy is the auction as a decide.Policy: at every decision it runs one
// auction at the state and plays Base's joint control. Its counters add
// up what the auctions cost, for a comparison table's rounds and messages
// per decision. It is not safe for concurrent use.
type Policy struct {
	Counts // what the auctions run so far cost; zero it to start counting again

	m   auctioneer
	cfg Config
}

// Counts add up what a Policy's auctions cost.
type Counts struct {
	Decisions int // auctions run, one per decision
	Rounds    int // bidding rounds run, summed over the decisions
	Settled   int // rounds until nothing changed, summed (see Stats.Settled)
	Messages  int // messages sent, summed
	Unsettled int // auctions that met their round cap
	Failed    int // auctions that could not run (the scenario's base policy decided)
}

// NewPolicy wraps m (see Wrap) and returns the auction policy on it.
func NewPolicy(m model.Model, cfg Config) (*Policy, error) {
	w, err := Wrap(m, cfg)
	if err != nil {
		return nil, err
	}
	return &Policy{m: w.(auctioneer), cfg: cfg.withDefaults()}, nil
}

// Config is the auction's configuration, defaults filled in.
func (p *Policy) Config() Config { return p.cfg }

// Name is "auction".
func (*Policy) Name() string { return "auction" }

// Model is the wrapped model, whose base policy this is (for rollout on
// the auction).
func (p *Policy) Model() model.Model { return p.m }

// Decide runs the auction at x. An auction that does not settle or cannot
// run still gives controls (see Wrap) and is counted in Unsettled or
// Failed, not an error.
func (p *Policy) Decide(x model.State, _ int, out []int) (decide.Stats, error) {
	if len(out) != p.m.Robots() {
		return decide.Stats{}, fmt.Errorf("auction: %d controls for %d robots", len(out), p.m.Robots())
	}
	st, err := p.m.auction(x, out)
	p.Decisions++
	p.Rounds += st.Rounds
	p.Settled += st.Settled
	p.Messages += st.Messages
	switch {
	case errors.Is(err, ErrNotSettled):
		p.Unsettled++
	case err != nil:
		p.Failed++
	}
	return decide.Stats{}, nil
}
