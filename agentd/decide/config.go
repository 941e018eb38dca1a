package decide

import (
	"flag"
	"fmt"
)

// Bounds on the Monte Carlo effort: the round protocol refuses round starts
// over them (agentd/turn), and the commands refuse flags over them. A turn
// simulates at most MaxSimSteps steps per candidate control and keeps one
// float per (candidate, sample).
const (
	MaxSamples  = 4096
	MaxHorizon  = 1000
	MaxSimSteps = 1 << 18 // Samples x (Horizon+1)
)

// DefaultConfig is the fleet's default effort: 16 samples per Q-factor and
// 20 base-policy steps after the first, which on the demo scenarios keeps
// one-at-a-time rollout within a few percent of all-at-once (see README).
func DefaultConfig() Config { return Config{Samples: 16, Horizon: 20} }

// Validate reports the first value outside its bounds, naming the flag that
// sets it.
func (c Config) Validate() error {
	switch {
	case c.Samples < 1 || c.Samples > MaxSamples:
		return fmt.Errorf("--samples %d: want 1..%d Monte Carlo samples per Q-factor", c.Samples, MaxSamples)
	case c.Horizon < 0 || c.Horizon > MaxHorizon:
		return fmt.Errorf("--horizon %d: want 0..%d base-policy steps after the first (0: the first step only)", c.Horizon, MaxHorizon)
	case c.Samples*(c.Horizon+1) > MaxSimSteps:
		return fmt.Errorf("--samples %d x (--horizon %d + 1) = %d simulated steps per Q-factor, over %d: lower one of them",
			c.Samples, c.Horizon, c.Samples*(c.Horizon+1), MaxSimSteps)
	case c.Workers < 0:
		return fmt.Errorf("--workers %d: want 0 (all cores) or more", c.Workers)
	}
	return nil
}

// RegisterFlags binds --samples, --horizon and --terminal-cost to c, with
// c's current values as the defaults shown in help.
func (c *Config) RegisterFlags(fs *flag.FlagSet) {
	fs.IntVar(&c.Samples, "samples", c.Samples, fmt.Sprintf("Monte Carlo samples per Q-factor (1..%d)", MaxSamples))
	fs.IntVar(&c.Horizon, "horizon", c.Horizon, fmt.Sprintf("base-policy steps simulated after the first step (0..%d; 0: the first step only)", MaxHorizon))
	fs.BoolVar(&c.TerminalCost, "terminal-cost", c.TerminalCost, "add the scenario's cost-to-go estimate where simulations truncate")
}
