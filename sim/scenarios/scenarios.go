// Package scenarios maps scenario names to their loaders, so commands accept
// --scenario NAME [--config FILE] for every scenario alike.
package scenarios

import (
	"fmt"
	"sort"
	"strconv"
	"strings"

	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

type loader struct {
	def    func(robots int) (model.Model, error)
	file   func(path string, robots int) (model.Model, error)
	starts func(m model.Model, starts []string) (model.Model, error)
	help   string
}

// Scenario is what an integrator's own module registers to run its own
// problem with Baton's commands (see Register).
type Scenario struct {
	// Default builds the built-in instance for robots robots (0: its own
	// count); it is what runs without --config.
	Default func(robots int) (model.Model, error)
	// Load builds an instance from a file (--config); nil: no files.
	Load func(path string, robots int) (model.Model, error)
	// Help is a one-line description for the commands' help.
	Help string
	// Starts gives robot r start position starts[r], in the scenario's
	// own terms (--starts, the fleet file's robots' start); nil: none.
	Starts func(m model.Model, starts []string) (model.Model, error)
}

// Register adds a scenario under name, before any command runs (an init
// function of the integrator's package, say). Its models must implement
// model.Model; to run as a fleet, model.Fleet; to be drawn in the fleet
// view, model.Drawer; for learned guesses, register features with
// learn.RegisterFeatures. It panics on a name taken or an empty Default,
// which are programming errors.
func Register(name string, s Scenario) {
	if name == "" || strings.ContainsAny(name, " \t,;") {
		panic(fmt.Sprintf("scenarios: bad name %q", name))
	}
	if _, taken := registry[name]; taken {
		panic(fmt.Sprintf("scenarios: %q registered twice", name))
	}
	if s.Default == nil {
		panic(fmt.Sprintf("scenarios: %q has no Default", name))
	}
	l := loader{def: s.Default, file: s.Load, starts: s.Starts, help: s.Help}
	if l.file == nil {
		l.file = func(path string, _ int) (model.Model, error) {
			return nil, fmt.Errorf("scenario %s reads no files (--config %s)", name, path)
		}
	}
	registry[name] = l
}

var registry = map[string]loader{
	"harbor": {
		def:  func(r int) (model.Model, error) { return harbor.Default(r) },
		file: func(p string, r int) (model.Model, error) { return harbor.Load(p, r) },
		help: "skimmer boats collect drifting slicks on a grid (full state)",
	},
	"upkeep": {
		def:  func(r int) (model.Model, error) { return upkeep.Default(r) },
		file: func(p string, r int) (model.Model, error) { return upkeep.Load(p, r) },
		help: "robots service a solar park's sites with hidden wear (belief state)",
	},
}

// Names lists the known scenarios.
func Names() []string {
	var n []string
	for k := range registry {
		n = append(n, k)
	}
	sort.Strings(n)
	return n
}

// Help is a one-line description per scenario.
func Help() string {
	var sb strings.Builder
	for _, n := range Names() {
		fmt.Fprintf(&sb, "  %-8s %s\n", n, registry[n].help)
	}
	return sb.String()
}

// Load builds scenario name from file (empty: the built-in demo) with the
// given robot count (0: the file's or the demo's own).
func Load(name, file string, robots int) (model.Model, error) {
	l, ok := registry[name]
	if !ok {
		return nil, fmt.Errorf("unknown scenario %q (known: %s)", name, strings.Join(Names(), ", "))
	}
	if robots < 0 {
		return nil, fmt.Errorf("--robots must be positive, got %d", robots)
	}
	if file == "" {
		return l.def(robots)
	}
	return l.file(file, robots)
}

// Robots is a --robots flag: a fleet size from 1 to model.MaxRobots, or
// unset (0: the file's or the demo's own). An explicit 0 is refused rather
// than taken as "the default".
type Robots int

func (r Robots) String() string {
	if r == 0 {
		return ""
	}
	return strconv.Itoa(int(r))
}

// Set parses a fleet size.
func (r *Robots) Set(s string) error {
	v, err := strconv.Atoi(strings.TrimSpace(s))
	if err != nil || v < 1 || v > model.MaxRobots {
		return fmt.Errorf("want a fleet size from 1 to %d", model.MaxRobots)
	}
	*r = Robots(v)
	return nil
}

// RobotsUsage is the --robots flag's help.
const RobotsUsage = "number of robots (default: the file's or demo's own)"

// LoadStarts is Load with each robot's start position given: starts is
// ';'-separated, one per robot, in the scenario's own terms (harbor: a
// cell "x,y"; upkeep: a site name). "" keeps the file's or demo's starts.
func LoadStarts(name, file string, robots int, starts string) (model.Model, error) {
	m, err := Load(name, file, robots)
	if err != nil || strings.TrimSpace(starts) == "" {
		return m, err
	}
	parts := strings.Split(starts, ";")
	for i := range parts {
		parts[i] = strings.TrimSpace(parts[i])
	}
	if len(parts) != m.Robots() {
		return nil, fmt.Errorf("--starts %q: %d start positions for %d robots", starts, len(parts), m.Robots())
	}
	switch m := m.(type) {
	case *harbor.Model:
		cells := make([][2]int, len(parts))
		for r, p := range parts {
			xs, ys, ok := strings.Cut(p, ",")
			x, errX := strconv.Atoi(strings.TrimSpace(xs))
			y, errY := strconv.Atoi(strings.TrimSpace(ys))
			if !ok || errX != nil || errY != nil {
				return nil, fmt.Errorf("--starts: robot %d: %q is not a cell x,y", r, p)
			}
			cells[r] = [2]int{x, y}
		}
		out, err := harbor.WithStarts(m, cells)
		if err != nil {
			return nil, fmt.Errorf("--starts: %w", err)
		}
		return out, nil
	case *upkeep.Model:
		out, err := m.WithStarts(parts)
		if err != nil {
			return nil, fmt.Errorf("--starts: %w", err)
		}
		return out, nil
	}
	if l := registry[name]; l.starts != nil {
		out, err := l.starts(m, parts)
		if err != nil {
			return nil, fmt.Errorf("--starts: %w", err)
		}
		return out, nil
	}
	return nil, fmt.Errorf("--starts: scenario %s takes no start positions", name)
}

// StartsUsage documents --starts.
const StartsUsage = "each robot's start position, ';'-separated (harbor: cells x,y; upkeep: site names); default: the scenario file's"
