package clock

import (
	"errors"
	"flag"
	"fmt"
	"slices"
	"strconv"
	"strings"
	"time"

	"baton/agentd/decide"
	"baton/agentd/turn"
	"baton/signal"
	"baton/sim/model"
)

// Config of one coordinator run. DefaultConfig has the documented
// defaults, Validate the documented bounds, RegisterFlags the command-line
// flags that set them (the coordinator's, and `sim fleet`'s, which passes
// them on).
type Config struct {
	Fleet  string
	Sender string // sender name in round starts, closes and report requests
	// Epoch identifies this run; a restarted coordinator must use a larger
	// one (the shell uses its start time in nanoseconds).
	Epoch  uint64
	Model  model.Fleet
	Digest string // scenario digest sent in every round start
	// Decide is the fleet's Monte Carlo effort, Seed the fleet seed.
	Decide decide.Config
	Seed   uint64
	Mode   turn.Mode
	// Guess names the fleet's guess source (signal.Names).
	Guess string
	// TurnBudget is the time each turn gets: turn k is due (k+1) x
	// TurnBudget after the round starts.
	TurnBudget time.Duration
	// Period: rounds start at most this often (0: as soon as the previous
	// round's reports are in).
	Period time.Duration
	// Rounds to run (0: until stopped), counted from round 1 of the
	// fleet's first run: a resumed run plays only the rounds left.
	Rounds int
	// Resume is the last round an earlier run of this fleet closed, as the
	// durable decision log has it (0: none): this run's first round is
	// Resume+1, so round numbers go on across coordinator restarts with no
	// gap and no round numbered twice.
	Resume uint64
	// ReportWait bounds the wait for robots' reports after a round.
	ReportWait time.Duration
	// GatherWait: before round 1, once this long has passed since the run
	// began and at least one robot reported, start without the others
	// (every robot reporting starts it at once).
	GatherWait time.Duration
	// HelloEvery: before round 1, ask robots for reports this often.
	HelloEvery time.Duration
	// Order is the preferred turn order (nil: 0..m-1); robots that are not
	// alive are skipped.
	Order Order
	// ConfirmCloses: the shell holds closes back at times (until the round
	// is in the durable log) and tells the machine when each went out
	// (CloseSent); the wait for reports starts only then.
	ConfirmCloses bool
	// AutoParallel (--mode auto) runs hybrid rounds and switches a round
	// to parallel when the measured links cannot fit a sequential round in
	// the period, and back once they can.
	AutoParallel bool
}

// DefaultConfig is a coordinator's configuration before flags: hybrid
// rounds with 200 ms per turn, base guesses, decide.DefaultConfig's effort.
func DefaultConfig() Config {
	return Config{Sender: "coordinator", Decide: decide.DefaultConfig(), Seed: 1, Mode: turn.Hybrid, Guess: "base",
		TurnBudget: 200 * time.Millisecond, ReportWait: 2 * time.Second, GatherWait: 3 * time.Second, HelloEvery: time.Second}
}

// Bounds on the waits a coordinator accepts.
const (
	MaxWait   = 10 * time.Minute // report, gather and hello waits
	MaxPeriod = 24 * time.Hour
)

// Validate reports the first value outside its bounds, naming its flag.
func (c Config) Validate() error {
	if c.Model == nil {
		return errors.New("no scenario model")
	}
	m := c.Model.Robots()
	switch {
	case m < 1 || m > turn.MaxRobots:
		return fmt.Errorf("--robots %d: a fleet has 1..%d robots", m, turn.MaxRobots)
	case len(c.Sender) > turn.MaxName || len(c.Fleet) > turn.MaxName:
		return fmt.Errorf("--fleet %q: at most %d bytes", c.Fleet, turn.MaxName)
	case c.Mode != turn.Sequential && c.Mode != turn.Parallel && c.Mode != turn.Hybrid:
		return fmt.Errorf("--mode %q: use sequential, parallel, hybrid or auto", c.Mode)
	case c.AutoParallel && c.Mode != turn.Hybrid:
		return fmt.Errorf("--mode auto runs hybrid rounds and switches them to parallel; it cannot start from %s", c.Mode)
	case c.AutoParallel && c.Period <= 0:
		return errors.New("--mode auto needs a --period: it switches to parallel when a sequential round would not fit in it")
	case !slices.Contains(signal.Names(), c.Guess):
		return fmt.Errorf("--guess %q: use one of %s", c.Guess, strings.Join(signal.Names(), ", "))
	case c.TurnBudget <= 0 || c.TurnBudget*time.Duration(m) > turn.MaxDeadline:
		return fmt.Errorf("--turn-deadline %s: want more than 0 and at most %s / %d robots = %s", c.TurnBudget,
			turn.MaxDeadline, m, turn.MaxDeadline/time.Duration(m))
	case c.Period < 0 || c.Period > MaxPeriod:
		return fmt.Errorf("--period %s: want 0 (back to back) up to %s", c.Period, MaxPeriod)
	case c.Rounds < 0:
		return fmt.Errorf("--rounds %d: want 0 (until stopped) or more", c.Rounds)
	case c.ReportWait <= 0 || c.ReportWait > MaxWait:
		return fmt.Errorf("--report-wait %s: want more than 0 and at most %s", c.ReportWait, MaxWait)
	case c.GatherWait <= 0 || c.GatherWait > MaxWait:
		return fmt.Errorf("--first-report-wait %s: want more than 0 and at most %s", c.GatherWait, MaxWait)
	case c.HelloEvery <= 0 || c.HelloEvery > MaxWait:
		return fmt.Errorf("report request interval %s: want more than 0 and at most %s", c.HelloEvery, MaxWait)
	}
	if err := c.Decide.Validate(); err != nil {
		return err
	}
	seen := map[int]bool{}
	for _, r := range c.Order {
		if r < 0 || r >= m || seen[r] {
			return fmt.Errorf("--order %s: want distinct robot ids 0..%d", c.Order, m-1)
		}
		seen[r] = true
	}
	if c.Order != nil && len(c.Order) != m {
		return fmt.Errorf("--order %s: lists %d of the %d robots; give every robot once (robots that are not alive are skipped anyway)", c.Order, len(c.Order), m)
	}
	return nil
}

// Params is the effort and seed as round starts carry them.
func (c Config) Params() turn.Params {
	return turn.Params{Samples: uint32(c.Decide.Samples), Horizon: int32(c.Decide.Horizon),
		TerminalCost: c.Decide.TerminalCost, Seed: c.Seed}
}

// order is the preferred order for a fleet of m.
func (c Config) order(m int) []int {
	if c.Order != nil {
		return c.Order
	}
	out := make([]int, m)
	for i := range out {
		out[i] = i
	}
	return out
}

// RegisterFlags binds the round flags to c, with c's current values as the
// defaults shown in help. The fleet's identity, scenario and NATS flags are
// the shell's, and so is --seed: the coordinator's is the fleet seed
// (RegisterSeed), `sim fleet`'s the run seed it derives the fleet seed from.
func (c *Config) RegisterFlags(fs *flag.FlagSet) {
	c.Decide.RegisterFlags(fs)
	fs.Var(modeFlag{c}, "mode", "how robots take turns in a round: sequential (one after another, each knowing its predecessors' choices; a late robot stalls the rest), "+
		"parallel (all at once, each guessing its predecessors), hybrid (in turn, but a robot whose predecessors have not been heard by its deadline guesses them), "+
		"or auto (hybrid that switches to parallel while measured links cannot fit a sequential round in --period)")
	fs.StringVar(&c.Guess, "guess", c.Guess, "the fleet's guess source for missing predecessors: "+strings.Join(signal.Names(), ", "))
	fs.DurationVar(&c.TurnBudget, "turn-deadline", c.TurnBudget, "time each turn gets; turn k is due (k+1) x this after the round starts")
	fs.DurationVar(&c.Period, "period", c.Period, "start rounds at most this often (0: as soon as the previous round's reports are in)")
	fs.IntVar(&c.Rounds, "rounds", c.Rounds, "stop after this many rounds (0: run until stopped)")
	fs.DurationVar(&c.ReportWait, "report-wait", c.ReportWait, "how long to wait for robots' reports after a round")
	fs.DurationVar(&c.GatherWait, "first-report-wait", c.GatherWait, "before round 1: start without the robots that have not reported after this long (all reported: at once)")
	fs.Var(&c.Order, "order", "preferred turn order, every robot once, e.g. 2,0,1 (default 0..m-1)")
}

// RegisterSeed binds --seed to the fleet seed.
func (c *Config) RegisterSeed(fs *flag.FlagSet) {
	fs.Uint64Var(&c.Seed, "seed", c.Seed, "fleet seed for every robot's Monte Carlo")
}

// Args renders c's round flags (and --seed) as command-line arguments, so
// a parent process passes its configuration on unchanged.
func (c Config) Args() []string {
	fs := flag.NewFlagSet("", flag.ContinueOnError)
	c.RegisterFlags(fs)
	c.RegisterSeed(fs)
	var out []string
	fs.VisitAll(func(f *flag.Flag) { out = append(out, "--"+f.Name+"="+f.Value.String()) })
	return out
}

// modeFlag is --mode: a round mode, or auto (hybrid with AutoParallel).
type modeFlag struct{ c *Config }

func (m modeFlag) String() string {
	if m.c == nil {
		return ""
	}
	return ModeName(*m.c)
}

func (m modeFlag) Set(s string) error {
	if s == "auto" {
		m.c.Mode, m.c.AutoParallel = turn.Hybrid, true
		return nil
	}
	if err := m.c.Mode.Set(s); err != nil {
		return fmt.Errorf("%q: use sequential, parallel, hybrid or auto", s)
	}
	m.c.AutoParallel = false
	return nil
}

// ModeName is the mode as --mode spells it ("auto" for AutoParallel).
func ModeName(c Config) string {
	if c.AutoParallel {
		return "auto"
	}
	return c.Mode.String()
}

// Order is a turn order as a flag: comma-separated robot ids.
type Order []int

func (o Order) String() string {
	s := make([]string, len(o))
	for i, r := range o {
		s[i] = strconv.Itoa(r)
	}
	return strings.Join(s, ",")
}

// Set parses "2,0,1" ("" : the default order).
func (o *Order) Set(s string) error {
	*o = nil
	if strings.TrimSpace(s) == "" {
		return nil
	}
	for _, f := range strings.Split(s, ",") {
		v, err := strconv.Atoi(strings.TrimSpace(f))
		if err != nil || v < 0 {
			return fmt.Errorf("%q is not a robot id", f)
		}
		*o = append(*o, v)
	}
	return nil
}
