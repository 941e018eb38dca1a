// Package drill runs fleets through scheduled faults and measures what
// each fault costs: a drill file names the scenario, the fleet, the fault
// schedule and the sweep (modes, guess sources, loss channels); every
// configuration of the sweep plays the same seeded episodes, so the
// differences between them come from the faults, not from luck.
//
// Message faults run on the virtual-time fleet (sim/vfleet) through the
// fault layer (sim/fault). Process faults (killed robots, coordinator or
// NATS server; stalled and reset connections) need real processes: the
// caller supplies a Runner for them (`sim drill` runs the same daemons
// `sim fleet` starts).
package drill

import (
	"errors"
	"fmt"
	"io"
	"os"
	"slices"
	"strconv"
	"strings"
	"time"

	"baton/agentd/decide"
	"baton/agentd/turn"
	"baton/signal"
	"baton/sim/config"
	"baton/sim/fault"
	"baton/sim/model"
	"baton/sim/scenarios"
)

// MaxFileBytes bounds a drill file.
const MaxFileBytes = 256 << 10

// Bounds on what a drill may ask for.
const (
	MaxRounds   = 100000
	MaxEpisodes = 10000
	MaxConfigs  = 1000
	MaxFaults   = 256
)

// fileYAML is a drill file as written.
type fileYAML struct {
	Name         string      `yaml:"name"`
	Scenario     string      `yaml:"scenario"`
	Site         string      `yaml:"site"`
	Robots       int         `yaml:"robots"`
	Rounds       int         `yaml:"rounds"`
	Episodes     int         `yaml:"episodes"`
	Seed         uint64      `yaml:"seed"`
	Samples      int         `yaml:"samples"`
	Horizon      *int        `yaml:"horizon"`
	TurnDeadline string      `yaml:"turn_deadline"`
	Period       string      `yaml:"period"`
	Hop          string      `yaml:"hop"`
	Jitter       string      `yaml:"jitter"`
	TurnTime     string      `yaml:"turn_time"`
	GuessModel   string      `yaml:"guess_model"`
	Train        *trainYAML  `yaml:"train"`
	Faults       []faultYAML `yaml:"faults"`
	Sweep        *sweepYAML  `yaml:"sweep"`
}

type trainYAML struct {
	Episodes int  `yaml:"episodes"`
	Dagger   *int `yaml:"dagger"`
}

type faultYAML struct {
	Kind      string     `yaml:"kind"`
	Rounds    []int      `yaml:"rounds"` // [from, until] or [at]
	Robots    []int      `yaml:"robots"`
	Links     [][]string `yaml:"links"`
	P         *float64   `yaml:"p"`
	Loss      *float64   `yaml:"loss"`       // burst: long-run loss
	MeanBurst *float64   `yaml:"mean_burst"` // burst: mean burst length
	PGoodBad  *float64   `yaml:"p_good_bad"`
	PBadGood  *float64   `yaml:"p_bad_good"`
	LossGood  *float64   `yaml:"loss_good"`
	LossBad   *float64   `yaml:"loss_bad"`
	Delay     *delayYAML `yaml:"delay"`
	Groups    [][]string `yaml:"groups"`
	Slow      string     `yaml:"slow"`
	Down      string     `yaml:"down"`
}

type delayYAML struct {
	Fixed string `yaml:"fixed"`
	Mean  string `yaml:"mean"`
	Dist  string `yaml:"dist"`
}

type sweepYAML struct {
	Modes   []string     `yaml:"modes"`
	Guesses []string     `yaml:"guesses"`
	Loss    []float64    `yaml:"loss"`
	Bursty  []burstyYAML `yaml:"bursty"`
	// Rounds limits the swept channel to [from, until] (default: all).
	Rounds []int `yaml:"rounds"`
}

type burstyYAML struct {
	Loss      float64 `yaml:"loss"`
	MeanBurst float64 `yaml:"mean_burst"`
}

// Drill is a checked drill file.
type Drill struct {
	Name     string
	File     string
	Scenario string
	Site     string
	Model    model.Fleet
	Rounds   int
	Episodes int
	Seed     uint64
	Decide   decide.Config
	// The fleet's timing, in virtual time for message drills.
	TurnBudget, Period, Hop, Jitter, TurnTime time.Duration
	GuessModel                                string
	TrainEpisodes, TrainDagger                int
	// Faults apply to every configuration; Points are the sweep.
	Faults []fault.Spec
	Points []Point
}

// Point is one configuration of the sweep.
type Point struct {
	Mode  string // sequential, parallel, hybrid or auto
	Guess string
	// The swept channel: independent loss Loss, or (Burst > 0) a
	// Gilbert channel of long-run loss Loss and mean burst Burst.
	Loss, Burst float64
	Channel     []fault.Spec
}

// Name is the point in a few words.
func (p Point) Name() string {
	s := p.Mode + " " + p.Guess
	switch {
	case p.Burst > 0:
		s += fmt.Sprintf(" bursty %g/%g", p.Loss, p.Burst)
	case p.Loss > 0:
		s += fmt.Sprintf(" loss %g", p.Loss)
	default:
		s += " no loss"
	}
	return s
}

// Process reports whether the drill needs real processes.
func (d *Drill) Process() bool {
	return slices.ContainsFunc(d.Faults, func(s fault.Spec) bool { return s.Kind.Process() })
}

// Load reads and checks a drill file.
func Load(path string) (*Drill, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("drill file: %w", err)
	}
	defer f.Close()
	data, err := io.ReadAll(io.LimitReader(f, MaxFileBytes+1))
	if err != nil {
		return nil, fmt.Errorf("drill file %s: %w", path, err)
	}
	if len(data) > MaxFileBytes {
		return nil, fmt.Errorf("drill file %s: more than %d bytes", path, MaxFileBytes)
	}
	return Parse(path, data)
}

// Parse checks a drill file's bytes; name is used in messages
// ("FILE:LINE: FIELD: problem"). A site file is read relative to the drill
// file's directory.
func Parse(name string, data []byte) (*Drill, error) {
	var y fileYAML
	doc, err := config.Parse(name, data, &y)
	if err != nil {
		return nil, err
	}
	d := &Drill{Name: y.Name, File: name, Scenario: y.Scenario, Rounds: y.Rounds, Episodes: y.Episodes, Seed: y.Seed,
		GuessModel: y.GuessModel, Decide: decide.Config{Samples: 6, Horizon: 10}}
	if d.Name == "" {
		d.Name = strings.TrimSuffix(baseName(name), ".yaml")
	}
	if !slices.Contains(scenarios.Names(), y.Scenario) {
		return nil, doc.Errorf("scenario", "%q: want one of %s", y.Scenario, strings.Join(scenarios.Names(), ", "))
	}
	if y.Robots < 1 || y.Robots > turn.MaxRobots {
		return nil, doc.Errorf("robots", "%d: want 1..%d", y.Robots, turn.MaxRobots)
	}
	if y.Rounds < 1 || y.Rounds > MaxRounds {
		return nil, doc.Errorf("rounds", "%d: want 1..%d", y.Rounds, MaxRounds)
	}
	if !doc.Has("episodes") {
		d.Episodes = 8
	}
	if d.Episodes < 2 || d.Episodes > MaxEpisodes {
		return nil, doc.Errorf("episodes", "%d: want 2..%d (confidence intervals need at least two)", y.Episodes, MaxEpisodes)
	}
	if !doc.Has("seed") {
		d.Seed = 1
	}
	if doc.Has("samples") {
		d.Decide.Samples = y.Samples
	}
	if y.Horizon != nil {
		d.Decide.Horizon = *y.Horizon
	}
	if err := d.Decide.Validate(); err != nil {
		field := "samples"
		if strings.Contains(err.Error(), "horizon") {
			field = "horizon"
		}
		return nil, doc.Errorf(field, "%v", err)
	}
	durations := []struct {
		field string
		s     string
		dst   *time.Duration
		def   time.Duration
	}{{"turn_deadline", y.TurnDeadline, &d.TurnBudget, 100 * time.Millisecond}, {"period", y.Period, &d.Period, 0},
		{"hop", y.Hop, &d.Hop, 2 * time.Millisecond}, {"jitter", y.Jitter, &d.Jitter, 0},
		{"turn_time", y.TurnTime, &d.TurnTime, 10 * time.Millisecond}}
	for _, f := range durations {
		v, err := duration(f.s, f.def)
		if err != nil || v < 0 || v > time.Hour {
			return nil, doc.Errorf(f.field, "%q: want a duration from 0 to 1h, like 20ms", f.s)
		}
		*f.dst = v
	}
	if d.TurnBudget <= 0 {
		return nil, doc.Errorf("turn_deadline", "must be more than 0")
	}
	if y.Site != "" {
		d.Site = y.Site
		if !strings.HasPrefix(d.Site, "/") {
			d.Site = joinDir(name, d.Site)
		}
	}
	m, err := scenarios.Load(y.Scenario, d.Site, y.Robots)
	if err != nil {
		return nil, doc.Errorf(ifElse(y.Site != "", "site", "scenario"), "%v", err)
	}
	fm, ok := m.(model.Fleet)
	if !ok {
		return nil, doc.Errorf("scenario", "%s cannot run as a fleet", y.Scenario)
	}
	d.Model = fm
	if d.GuessModel != "" && !strings.HasPrefix(d.GuessModel, "/") {
		d.GuessModel = joinDir(name, d.GuessModel)
	}
	d.TrainEpisodes, d.TrainDagger = 30, 2
	if y.Train != nil {
		if y.Train.Episodes < 1 || y.Train.Episodes > 10000 {
			return nil, doc.Errorf("train.episodes", "%d: want 1..10000", y.Train.Episodes)
		}
		d.TrainEpisodes = y.Train.Episodes
		if y.Train.Dagger != nil {
			if *y.Train.Dagger < 0 || *y.Train.Dagger > 20 {
				return nil, doc.Errorf("train.dagger", "%d: want 0..20 rounds", *y.Train.Dagger)
			}
			d.TrainDagger = *y.Train.Dagger
		}
	}
	if len(y.Faults) > MaxFaults {
		return nil, doc.Errorf("faults", "%d faults: at most %d", len(y.Faults), MaxFaults)
	}
	for i, fy := range y.Faults {
		path := fmt.Sprintf("faults[%d]", i)
		s, err := fy.spec(doc, path, y.Robots, y.Rounds)
		if err != nil {
			return nil, err
		}
		d.Faults = append(d.Faults, s)
	}
	if err := d.sweep(doc, y.Sweep, y.Robots, y.Rounds); err != nil {
		return nil, err
	}
	for _, p := range d.Points {
		if p.Mode == "auto" && d.Period <= 0 {
			return nil, doc.Errorf("sweep.modes", "auto switches to parallel when a sequential round cannot fit the period: set period")
		}
	}
	return d, nil
}

func ifElse(c bool, a, b string) string {
	if c {
		return a
	}
	return b
}

func baseName(p string) string {
	if i := strings.LastIndexByte(p, '/'); i >= 0 {
		return p[i+1:]
	}
	return p
}

func joinDir(file, rel string) string {
	if i := strings.LastIndexByte(file, '/'); i >= 0 {
		return file[:i+1] + rel
	}
	return rel
}

func duration(s string, def time.Duration) (time.Duration, error) {
	if s == "" {
		return def, nil
	}
	if s == "0" {
		return 0, nil
	}
	return time.ParseDuration(s)
}

// Modes a sweep may name.
var Modes = []string{"sequential", "parallel", "hybrid", "auto"}

func (d *Drill) sweep(doc *config.Doc, s *sweepYAML, robots, rounds int) error {
	if s == nil {
		d.Points = []Point{{Mode: "hybrid", Guess: "base"}}
		return nil
	}
	if len(s.Modes) == 0 && len(s.Guesses) == 0 && len(s.Loss) == 0 && len(s.Bursty) == 0 {
		return doc.Errorf("sweep", "nothing to sweep: give modes, guesses, loss or bursty (or leave sweep out for one hybrid run with base guesses)")
	}
	from, until := 0, 0
	if len(s.Rounds) > 0 {
		var err error
		if from, until, err = window(s.Rounds, rounds); err != nil {
			return doc.Errorf("sweep.rounds", "%v", err)
		}
	}
	modes, guesses := s.Modes, s.Guesses
	if len(modes) == 0 {
		modes = []string{"hybrid"}
	}
	if len(guesses) == 0 {
		guesses = []string{"base"}
	}
	for i, m := range modes {
		if !slices.Contains(Modes, m) {
			return doc.Errorf(fmt.Sprintf("sweep.modes[%d]", i), "%q: want one of %s", m, strings.Join(Modes, ", "))
		}
	}
	for i, g := range guesses {
		if !slices.Contains(signal.Names(), g) {
			return doc.Errorf(fmt.Sprintf("sweep.guesses[%d]", i), "%q: want one of %s", g, strings.Join(signal.Names(), ", "))
		}
	}
	type channel struct {
		loss, burst float64
		specs       []fault.Spec
	}
	var chans []channel
	for i, p := range s.Loss {
		if !(p >= 0 && p <= 1) {
			return doc.Errorf(fmt.Sprintf("sweep.loss[%d]", i), "%g: a loss rate must be in [0,1]", p)
		}
		c := channel{loss: p}
		if p > 0 {
			c.specs = []fault.Spec{{Kind: fault.Loss, P: p, From: from, Until: until}}
		}
		chans = append(chans, c)
	}
	for i, b := range s.Bursty {
		path := fmt.Sprintf("sweep.bursty[%d]", i)
		if !(b.Loss > 0 && b.Loss < 1) {
			return doc.Errorf(path+".loss", "%g: a bursty channel's long-run loss must be in (0,1)", b.Loss)
		}
		if !(b.MeanBurst >= 1 && b.MeanBurst <= 1e6) {
			return doc.Errorf(path+".mean_burst", "%g: the mean burst is at least 1 message", b.MeanBurst)
		}
		g := fault.Bursty(b.Loss, b.MeanBurst)
		if g.P > 1 {
			return doc.Errorf(path, "loss %g with bursts of %g: the good-to-bad probability would be %.3g > 1; make the bursts longer", b.Loss, b.MeanBurst, g.P)
		}
		chans = append(chans, channel{loss: b.Loss, burst: b.MeanBurst, specs: []fault.Spec{{Kind: fault.Burst, GE: g, From: from, Until: until}}})
	}
	if len(chans) == 0 {
		chans = []channel{{}}
	}
	for _, m := range modes {
		for _, g := range guesses {
			for _, c := range chans {
				d.Points = append(d.Points, Point{Mode: m, Guess: g, Loss: c.loss, Burst: c.burst, Channel: c.specs})
			}
		}
	}
	if len(d.Points) > MaxConfigs {
		return doc.Errorf("sweep", "%d configurations: at most %d", len(d.Points), MaxConfigs)
	}
	return nil
}

// window reads [from, until] or [at].
func window(r []int, rounds int) (from, until int, err error) {
	switch len(r) {
	case 1:
		from, until = r[0], r[0]
	case 2:
		from, until = r[0], r[1]
	default:
		return 0, 0, fmt.Errorf("%v: give [from, until] or [round]", r)
	}
	switch {
	case from < 1:
		return 0, 0, fmt.Errorf("%v: rounds count from 1", r)
	case until < from:
		return 0, 0, fmt.Errorf("%v: the window ends before it begins", r)
	case until > rounds:
		return 0, 0, fmt.Errorf("%v: past the drill's last round %d", r, rounds)
	}
	return from, until, nil
}

func (fy faultYAML) spec(doc *config.Doc, path string, robots, rounds int) (fault.Spec, error) {
	s := fault.Spec{Kind: fault.Kind(fy.Kind), Robots: fy.Robots}
	if fy.Kind == "" {
		return s, doc.Errorf(path+".kind", "missing: want one of %s", fault.KindList())
	}
	if !slices.Contains(fault.Kinds, s.Kind) {
		return s, doc.Errorf(path+".kind", "unknown fault %q: want one of %s", fy.Kind, fault.KindList())
	}
	if len(fy.Rounds) > 0 {
		var err error
		if s.From, s.Until, err = window(fy.Rounds, rounds); err != nil {
			return s, doc.Errorf(path+".rounds", "%v", err)
		}
	} else if s.Kind.Process() {
		return s, doc.Errorf(path+".rounds", "%s happens at one round: give rounds: [N]", s.Kind)
	}
	for i, r := range fy.Robots {
		if r < 0 || r >= robots {
			return s, doc.Errorf(fmt.Sprintf("%s.robots[%d]", path, i), "unknown robot %d: the fleet has robots 0..%d", r, robots-1)
		}
	}
	for i, l := range fy.Links {
		if len(l) != 2 {
			return s, doc.Errorf(fmt.Sprintf("%s.links[%d]", path, i), "a link is [from, to]")
		}
		var e [2]int
		for j := range l {
			v, err := endpoint(l[j], robots)
			if err != nil {
				return s, doc.Errorf(fmt.Sprintf("%s.links[%d]", path, i), "%v", err)
			}
			e[j] = v
		}
		s.Links = append(s.Links, e)
	}
	for i, g := range fy.Groups {
		var grp []int
		for _, x := range g {
			v, err := endpoint(x, robots)
			if err != nil {
				return s, doc.Errorf(fmt.Sprintf("%s.groups[%d]", path, i), "%v", err)
			}
			grp = append(grp, v)
		}
		s.Groups = append(s.Groups, grp)
	}
	prob := func(field string, p *float64, dst *float64) error {
		if p == nil {
			return nil
		}
		if !(*p >= 0 && *p <= 1) {
			return doc.Errorf(path+"."+field, "%g: a probability must be in [0,1]", *p)
		}
		*dst = *p
		return nil
	}
	// Fields that mean nothing for this kind are mistakes worth naming,
	// and so are missing ones: a fault that does nothing is a typo.
	scope := []string{"rounds", "robots", "links"}
	allowed := map[fault.Kind][]string{
		fault.Loss: {"p"}, fault.Duplicate: {"p", "delay"}, fault.Reorder: {"p", "delay"}, fault.Delay: {"delay"},
		fault.Burst: {"loss", "mean_burst", "p_good_bad", "p_bad_good", "loss_good", "loss_bad"}, fault.Partition: {"groups"},
		fault.Slow: {"slow"}, fault.KillRobot: {"down"}, fault.KillCoordinator: {"down"}, fault.KillNATS: {"down"},
		fault.Stall: {"down"}, fault.Reset: {},
	}
	switch s.Kind {
	case fault.Slow, fault.KillRobot:
		scope = []string{"rounds", "robots"}
	case fault.Partition, fault.KillCoordinator, fault.KillNATS, fault.Stall, fault.Reset:
		scope = []string{"rounds"}
	}
	for _, f := range []string{"robots", "links", "p", "delay", "loss", "mean_burst", "p_good_bad", "p_bad_good", "loss_good", "loss_bad", "groups", "slow", "down"} {
		if doc.Has(path+"."+f) && !slices.Contains(allowed[s.Kind], f) && !slices.Contains(scope, f) {
			return s, doc.Errorf(path+"."+f, "does not apply to a %s fault (it takes: %s)", s.Kind, strings.Join(append(scope, allowed[s.Kind]...), ", "))
		}
	}
	need := map[fault.Kind][]string{fault.Loss: {"p"}, fault.Duplicate: {"p"}, fault.Reorder: {"p", "delay"},
		fault.Delay: {"delay"}, fault.Partition: {"groups"}, fault.Slow: {"slow"}, fault.KillRobot: {"robots"}}
	for _, f := range need[s.Kind] {
		if !doc.Has(path + "." + f) {
			return s, doc.Errorf(path, "a %s fault needs %s", s.Kind, f)
		}
	}
	for i, l := range s.Links {
		if l[0] == l[1] {
			return s, doc.Errorf(fmt.Sprintf("%s.links[%d]", path, i), "a link from %s to itself carries nothing", fault.EndpointName(l[0]))
		}
	}
	if err := prob("p", fy.P, &s.P); err != nil {
		return s, err
	}
	if s.Kind == fault.Burst {
		channel := fy.PGoodBad != nil || fy.PBadGood != nil || fy.LossGood != nil || fy.LossBad != nil
		switch {
		case (fy.Loss != nil || fy.MeanBurst != nil) && channel:
			return s, doc.Errorf(path, "give loss and mean_burst, or the channel's p_good_bad, p_bad_good (and loss_good, loss_bad), not both")
		case fy.Loss == nil && fy.MeanBurst == nil && (fy.PGoodBad == nil || fy.PBadGood == nil):
			return s, doc.Errorf(path, "a burst fault needs loss and mean_burst, or p_good_bad and p_bad_good")
		case fy.Loss != nil || fy.MeanBurst != nil:
			if fy.Loss == nil || fy.MeanBurst == nil {
				return s, doc.Errorf(path, "a burst fault takes loss and mean_burst together (or p_good_bad, p_bad_good, loss_good, loss_bad)")
			}
			if !(*fy.Loss > 0 && *fy.Loss < 1) {
				return s, doc.Errorf(path+".loss", "%g: want a long-run loss in (0,1)", *fy.Loss)
			}
			if !(*fy.MeanBurst >= 1) {
				return s, doc.Errorf(path+".mean_burst", "%g: the mean burst is at least 1 message", *fy.MeanBurst)
			}
			s.GE = fault.Bursty(*fy.Loss, *fy.MeanBurst)
		default:
			s.GE.LossBad = 1
			for _, f := range []struct {
				name string
				p    *float64
				dst  *float64
			}{{"p_good_bad", fy.PGoodBad, &s.GE.P}, {"p_bad_good", fy.PBadGood, &s.GE.R}, {"loss_good", fy.LossGood, &s.GE.LossGood}, {"loss_bad", fy.LossBad, &s.GE.LossBad}} {
				if err := prob(f.name, f.p, f.dst); err != nil {
					return s, err
				}
			}
		}
	}
	if fy.Delay != nil {
		var err error
		if s.Delay.Fixed, err = duration(fy.Delay.Fixed, 0); err != nil {
			return s, doc.Errorf(path+".delay.fixed", "%q: want a duration like 20ms", fy.Delay.Fixed)
		}
		if s.Delay.Mean, err = duration(fy.Delay.Mean, 0); err != nil {
			return s, doc.Errorf(path+".delay.mean", "%q: want a duration like 20ms", fy.Delay.Mean)
		}
		s.Delay.Dist = fy.Delay.Dist
		if s.Delay.Dist == "" {
			s.Delay.Dist = fault.Exponential
		}
		if !slices.Contains(fault.Dists, s.Delay.Dist) {
			return s, doc.Errorf(path+".delay.dist", "%q: want one of %s", fy.Delay.Dist, strings.Join(fault.Dists, ", "))
		}
	}
	var err error
	if s.Slow, err = duration(fy.Slow, 0); err != nil {
		return s, doc.Errorf(path+".slow", "%q: want a duration like 300ms", fy.Slow)
	}
	if s.Down, err = duration(fy.Down, 0); err != nil {
		return s, doc.Errorf(path+".down", "%q: want a duration like 2s", fy.Down)
	}
	if err := s.Check(robots, rounds); err != nil {
		return s, doc.Errorf(path, "%v", err)
	}
	return s, nil
}

// endpoint reads a robot id or "coordinator".
func endpoint(s string, robots int) (int, error) {
	if s == "coordinator" {
		return fault.Coordinator, nil
	}
	v, err := strconv.Atoi(s)
	if err != nil {
		return 0, fmt.Errorf("%q: want a robot id or coordinator", s)
	}
	if v < 0 || v >= robots {
		return 0, fmt.Errorf("unknown robot %d: the fleet has robots 0..%d", v, robots-1)
	}
	return v, nil
}

var errNoRunner = errors.New("this drill kills processes or connections: it needs real processes (sim drill runs them)")
