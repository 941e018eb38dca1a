package delivery

import (
	_ "embed"
	"fmt"
	"math"

	"baton/sim/config"
)

// file is the YAML form of an instance; depot.yaml is a commented example.
// Optional fields are recognised by doc.Has, so a zero written in the file
// is checked rather than silently replaced by the default.
type file struct {
	Robots   int           `yaml:"robots"`
	Start    []string      `yaml:"start"`
	Horizon  int           `yaml:"horizon"`
	Discount float64       `yaml:"discount"`
	Capacity int           `yaml:"capacity"`
	WaitCost float64       `yaml:"wait_cost"`
	RideCost float64       `yaml:"ride_cost"`
	Send     float64       `yaml:"send"`
	Stations []fileStation `yaml:"stations"`
	Roads    [][]string    `yaml:"roads"`
	Parcels  []fileParcel  `yaml:"parcels"`
}

type fileStation struct {
	Name    string  `yaml:"name"`
	X       float64 `yaml:"x"`
	Y       float64 `yaml:"y"`
	Send    float64 `yaml:"send"`
	Receive float64 `yaml:"receive"`
}

type fileParcel struct {
	At string `yaml:"at"`
	To string `yaml:"to"`
}

// Defaults for fields a file leaves out.
const (
	defaultRobots   = 3
	defaultHorizon  = 60
	defaultDiscount = 1
	defaultCapacity = 32
	defaultCost     = 1
	defaultSend     = 0.04
	defaultReceive  = 1
)

//go:embed depot.yaml
var depot []byte

// Default is the built-in instance, depot.yaml (embedded); robots > 0
// overrides its robot count (all start at the hub).
func Default(robots int) (*Model, error) {
	return Parse("depot.yaml", depot, robots)
}

// Load reads an instance file (at most config.MaxFileBytes) through
// baton/sim/config, so every problem is reported as FILE:LINE: FIELD:
// message; robots > 0 overrides the file's robot count.
func Load(path string, robots int) (*Model, error) {
	data, err := config.ReadBytes(path)
	if err != nil {
		return nil, err
	}
	return Parse(path, data, robots)
}

// Parse is Load on bytes already read; name appears in error messages.
// robots > 0 overrides the file's robot count: with one start station all
// robots start there, with a list of them the counts must agree.
func Parse(name string, data []byte, robots int) (*Model, error) {
	var f file
	doc, err := config.Parse(name, data, &f)
	if err != nil {
		return nil, err
	}
	return f.build(doc, robots)
}

func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

func idx(field string, i int) string { return fmt.Sprintf("%s[%d]", field, i) }

// build validates f and makes the model; every error names the file, the
// line and the field.
func (f *file) build(doc *config.Doc, override int) (*Model, error) {
	m := &Model{horizon: defaultHorizon, discount: defaultDiscount, capacity: defaultCapacity,
		waitCost: defaultCost, rideCost: defaultCost}
	if doc.Has("horizon") {
		if m.horizon = f.Horizon; m.horizon < 1 || m.horizon > MaxHorizon {
			return nil, doc.Errorf("horizon", "must be between 1 and %d steps, got %d", MaxHorizon, f.Horizon)
		}
	}
	if doc.Has("discount") {
		if m.discount = f.Discount; !(m.discount > 0 && m.discount <= 1) {
			return nil, doc.Errorf("discount", "must be in (0,1], got %g", f.Discount)
		}
	}
	if doc.Has("capacity") {
		if m.capacity = f.Capacity; m.capacity < 1 || m.capacity > MaxCapacity {
			return nil, doc.Errorf("capacity", "must be between 1 and %d parcel slots, got %d", MaxCapacity, f.Capacity)
		}
	}
	for _, c := range []struct {
		field string
		v     float64
		dst   *float64
	}{{"wait_cost", f.WaitCost, &m.waitCost}, {"ride_cost", f.RideCost, &m.rideCost}} {
		if doc.Has(c.field) {
			if !finite(c.v) || c.v < 0 {
				return nil, doc.Errorf(c.field, "must be a finite cost >= 0, got %g", c.v)
			}
			*c.dst = c.v
		}
	}
	send := defaultSend
	if doc.Has("send") {
		if send = f.Send; !(send >= 0 && send <= 1) {
			return nil, doc.Errorf("send", "is a probability per step and must be in [0,1], got %g", f.Send)
		}
	}
	receive, err := f.stations(doc, m, send)
	if err != nil {
		return nil, err
	}
	if err := f.roads(doc, m); err != nil {
		return nil, err
	}
	if err := f.destinations(doc, m, receive); err != nil {
		return nil, err
	}
	if err := f.start(doc, m, override); err != nil {
		return nil, err
	}
	if err := f.parcels(doc, m); err != nil {
		return nil, err
	}
	return m, nil
}

// stations reads the stations and returns their receive weights.
func (f *file) stations(doc *config.Doc, m *Model, send float64) ([]float64, error) {
	if len(f.Stations) < 2 {
		return nil, doc.Errorf("stations", "want at least 2 stations {name: ..., x: ..., y: ...}, got %d", len(f.Stations))
	}
	if len(f.Stations) > MaxStations {
		return nil, doc.Errorf("stations", "at most %d stations, got %d", MaxStations, len(f.Stations))
	}
	seen := map[string]int{}
	var receive []float64
	for i, s := range f.Stations {
		at := idx("stations", i)
		if s.Name == "" {
			return nil, doc.Errorf(at+".name", "missing: every station needs a name")
		}
		if j, dup := seen[s.Name]; dup {
			return nil, doc.Errorf(at+".name", "duplicate station name %q (also stations[%d])", s.Name, j)
		}
		seen[s.Name] = i
		if !finite(s.X) || !finite(s.Y) {
			return nil, doc.Errorf(at, "x and y must be finite numbers")
		}
		p := send
		if doc.Has(at + ".send") {
			if p = s.Send; !(p >= 0 && p <= 1) {
				return nil, doc.Errorf(at+".send", "is a probability per step and must be in [0,1], got %g", s.Send)
			}
		}
		w := float64(defaultReceive)
		if doc.Has(at + ".receive") {
			if w = s.Receive; !finite(w) || w < 0 {
				return nil, doc.Errorf(at+".receive", "is a weight and must be a finite number >= 0, got %g", s.Receive)
			}
		}
		m.names = append(m.names, s.Name)
		m.xy = append(m.xy, [2]float64{s.X, s.Y})
		m.send = append(m.send, p)
		receive = append(receive, w)
	}
	m.n = len(m.names)
	return receive, nil
}

func (m *Model) station(name string) (int32, bool) {
	for i, s := range m.names {
		if s == name {
			return int32(i), true
		}
	}
	return -1, false
}

// roads reads the two-way roads, checks the graph is connected and fills
// the neighbour, distance and next-hop tables.
func (f *file) roads(doc *config.Doc, m *Model) error {
	n := m.n
	m.nbr = make([][]int32, n)
	have := map[[2]int32]int{}
	for i, r := range f.Roads {
		at := idx("roads", i)
		if len(r) != 2 {
			return doc.Errorf(at, "want [station, station], got %d names", len(r))
		}
		a, okA := m.station(r[0])
		b, okB := m.station(r[1])
		switch {
		case !okA:
			return doc.Errorf(at, "no station named %q", r[0])
		case !okB:
			return doc.Errorf(at, "no station named %q", r[1])
		case a == b:
			return doc.Errorf(at, "road from %q to itself", r[0])
		}
		key := [2]int32{min(a, b), max(a, b)}
		if j, dup := have[key]; dup {
			return doc.Errorf(at, "duplicate road %s - %s (also roads[%d])", r[0], r[1], j)
		}
		have[key] = i
		m.nbr[a] = append(m.nbr[a], b)
		m.nbr[b] = append(m.nbr[b], a)
	}
	for s := range m.nbr {
		nb := m.nbr[s]
		for i := 1; i < len(nb); i++ {
			for j := i; j > 0 && nb[j] < nb[j-1]; j-- {
				nb[j], nb[j-1] = nb[j-1], nb[j]
			}
		}
		m.maxCtl = max(m.maxCtl, len(nb)+1)
	}
	// Hop counts by breadth-first search from every station.
	m.dist = make([]int32, n*n)
	queue := make([]int32, 0, n)
	for src := range n {
		d := m.dist[src*n : (src+1)*n]
		for i := range d {
			d[i] = -1
		}
		d[src] = 0
		queue = append(queue[:0], int32(src))
		for len(queue) > 0 {
			a := queue[0]
			queue = queue[1:]
			for _, v := range m.nbr[a] {
				if d[v] < 0 {
					d[v] = d[a] + 1
					queue = append(queue, v)
				}
			}
		}
		for i, v := range d {
			if v < 0 {
				return doc.Errorf(idx("stations", i), "station %q cannot be reached from %q by roads (the graph must be connected)", m.names[i], m.names[src])
			}
		}
	}
	// The first move toward each station: the lowest-index neighbour on a
	// shortest path (neighbours are sorted, so the first hit).
	m.hop = make([]int32, n*n)
	for a := range n {
		for b := range n {
			if a == b {
				continue
			}
			for i, v := range m.nbr[a] {
				if m.dist[int(v)*n+b] == m.dist[a*n+b]-1 {
					m.hop[a*n+b] = int32(i + 1)
					break
				}
			}
		}
	}
	return nil
}

// destinations builds each station's cumulative destination distribution:
// every other station, weighted by receive.
func (f *file) destinations(doc *config.Doc, m *Model, receive []float64) error {
	n := m.n
	m.destCum = make([]float64, n*n)
	for from := range n {
		total := 0.0
		for to, w := range receive {
			if to != from {
				total += w
			}
		}
		if m.send[from] > 0 {
			m.sends = true
			if total <= 0 {
				return doc.Errorf(idx("stations", from), "station %q sends parcels but no other station receives any (every other receive is 0)", m.names[from])
			}
		}
		acc := 0.0
		for to, w := range receive {
			if to != from && total > 0 {
				acc += w / total
			}
			m.destCum[from*n+to] = acc
		}
	}
	return nil
}

// start reads the robots' start stations: one for every robot, or one per
// robot.
func (f *file) start(doc *config.Doc, m *Model, override int) error {
	robots := defaultRobots
	if doc.Has("robots") {
		if robots = f.Robots; robots < 1 || robots > MaxRobots {
			return doc.Errorf("robots", "must be between 1 and %d, got %d", MaxRobots, f.Robots)
		}
	} else if len(f.Start) > 1 {
		robots = len(f.Start)
	}
	if override > 0 {
		if override > MaxRobots {
			return doc.Errorf("robots", "at most %d robots, %d were asked for", MaxRobots, override)
		}
		robots = override
	}
	names := f.Start
	switch {
	case !doc.Has("start"):
		names = []string{m.names[0]}
	case len(names) == 0:
		return doc.Errorf("start", "want a list of stations: one for every robot, or one per robot")
	case len(names) > 1 && len(names) != robots:
		if override > 0 {
			return doc.Errorf("start", "lists %d stations but %d robots were asked for; give one station or a list of %d", len(names), override, override)
		}
		return doc.Errorf("start", "lists %d stations for %d robots", len(names), robots)
	}
	for r := range robots {
		name := names[min(r, len(names)-1)]
		s, ok := m.station(name)
		if !ok {
			return doc.Errorf(idx("start", min(r, len(names)-1)), "no station named %q", name)
		}
		m.startPos = append(m.startPos, s)
	}
	m.robots = robots
	return nil
}

// parcels reads the parcels waiting at the start.
func (f *file) parcels(doc *config.Doc, m *Model) error {
	if len(f.Parcels) > m.capacity {
		return doc.Errorf("parcels", "lists %d parcels but capacity is %d slots", len(f.Parcels), m.capacity)
	}
	for i, p := range f.Parcels {
		at := idx("parcels", i)
		a, ok := m.station(p.At)
		if !ok {
			return doc.Errorf(at+".at", "no station named %q", p.At)
		}
		b, ok := m.station(p.To)
		if !ok {
			return doc.Errorf(at+".to", "no station named %q", p.To)
		}
		if a == b {
			return doc.Errorf(at+".to", "a parcel at %q for %q is already there", p.At, p.To)
		}
		m.startPar = append(m.startPar, [2]int32{a, b})
	}
	return nil
}

// WithStarts is m with robot r starting at station starts[r] (by name),
// one per robot; the tables are shared (the model is read-only). It is
// what --starts and a fleet file's per-robot start positions need, once
// Baton's scenario registry can pass them to a registered scenario (today
// scenarios.LoadStarts knows only its built-in ones).
func (m *Model) WithStarts(starts []string) (*Model, error) {
	if len(starts) != m.robots {
		return nil, fmt.Errorf("%d start stations for %d robots", len(starts), m.robots)
	}
	out := *m
	out.startPos = make([]int32, len(starts))
	for r, name := range starts {
		s, ok := m.station(name)
		if !ok {
			return nil, fmt.Errorf("robot %d: no station named %q", r, name)
		}
		out.startPos[r] = s
	}
	return &out, nil
}
