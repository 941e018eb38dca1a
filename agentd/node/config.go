package node

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"slices"
	"strings"
	"time"

	"go.uber.org/zap"

	"baton/agentd/turn"
	pb "baton/proto"
	"baton/signal"
	"baton/sim/model"
)

// Config of one robot's daemon. DefaultConfig has the documented defaults,
// Validate the bounds, RegisterFlags agentd's flags for the tunable part.
type Config struct {
	Fleet    string
	Subjects pb.Subjects
	Robot    int
	Sender   string
	Model    model.Fleet
	// Digest of the scenario file; rounds with another digest are refused.
	Digest string
	// Compute is nil for the real rollout.
	Compute Computer
	// Guess names the fallback guess source: used when a round start names
	// none, or names one this robot cannot make (learned without a
	// classifier, or a name this build does not know).
	Guess string
	// Guesses configures the sources (the classifier for learned,
	// recompute's fallback).
	Guesses signal.Options
	// GuessMargin is what recompute leaves before this robot's own turn
	// deadline, besides the measured hop and its own turn.
	GuessMargin time.Duration
	// Stale: with no round start admitted for this long the robot holds.
	Stale   time.Duration
	Log     *zap.Logger
	Metrics *Metrics
	// FetchModel fetches version v of the fleet's guess model (nil: this
	// robot does not take models from the fleet).
	FetchModel func(ctx context.Context, v uint64) ([]byte, error)
	// OnRound, when set, is told when this robot admitted a round start
	// (the latency benchmark times the turn chain from there).
	OnRound func(round uint64, at time.Time)
}

// DefaultConfig is agentd's configuration before flags.
func DefaultConfig() Config {
	return Config{Guess: "base", GuessMargin: 2 * time.Millisecond, Stale: 10 * time.Second}
}

// MaxStale bounds --stale: a decision older than this is never served.
const MaxStale = time.Hour

// Validate reports the first value outside its bounds, naming its flag.
func (c Config) Validate() error {
	switch {
	case c.Model == nil:
		return errors.New("no scenario model")
	case c.Model.Robots() < 1 || c.Model.Robots() > turn.MaxRobots:
		return fmt.Errorf("--robots %d: a fleet has 1..%d robots", c.Model.Robots(), turn.MaxRobots)
	case c.Robot < 0 || c.Robot >= c.Model.Robots():
		return fmt.Errorf("--robot %d: this fleet has robots 0..%d", c.Robot, c.Model.Robots()-1)
	case !slices.Contains(signal.Names(), c.Guess):
		return fmt.Errorf("--guess %q: use one of %s", c.Guess, strings.Join(signal.Names(), ", "))
	case c.GuessMargin < 0 || c.GuessMargin > turn.MaxDeadline:
		return fmt.Errorf("--guess-margin %s: want 0 up to %s", c.GuessMargin, turn.MaxDeadline)
	case c.Stale <= 0 || c.Stale > MaxStale:
		return fmt.Errorf("--stale %s: want more than 0 and at most %s", c.Stale, MaxStale)
	case len(c.Sender) > turn.MaxName || len(c.Fleet) > turn.MaxName:
		return fmt.Errorf("--fleet %q: at most %d bytes", c.Fleet, turn.MaxName)
	}
	return nil
}

// RegisterFlags binds agentd's tunable flags to c, with c's current values
// as the defaults shown in help.
func (c *Config) RegisterFlags(fs *flag.FlagSet) {
	fs.StringVar(&c.Guess, "guess", c.Guess, "fallback guess source, used when a round start names none or one this robot cannot make: "+
		strings.Join(signal.Names(), ", ")+" (the coordinator's --guess picks the fleet's)")
	fs.DurationVar(&c.GuessMargin, "guess-margin", c.GuessMargin, "what recompute guesses leave before this robot's turn deadline, besides the hop and its own turn")
	fs.DurationVar(&c.Stale, "stale", c.Stale, "hold when no round start has been admitted for this long")
}
