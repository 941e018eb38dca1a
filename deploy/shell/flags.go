package shell

import (
	"errors"
	"flag"
	"fmt"
	"os"
	"strings"
	"time"

	"baton/sim/scenarios"
)

// Common are the flags agentd and the coordinator share, so the two
// spell and document them the same way.
type Common struct {
	NATS, Creds, Fleet, Prefix string
	Scenario, Config           string
	Robots                     int
	ConnectTimeout             time.Duration
	LogLevel                   string
	LogJSON                    bool
}

// Register adds the shared flags to fs; configHelp says whose file must match.
func (c *Common) Register(fs *flag.FlagSet, configHelp string) {
	fs.StringVar(&c.NATS, "nats", "nats://127.0.0.1:4222", "NATS server URL list, comma-separated")
	fs.StringVar(&c.Creds, "creds", "", "NATS credentials file")
	fs.StringVar(&c.Fleet, "fleet", "demo", "fleet id")
	fs.StringVar(&c.Prefix, "prefix", "baton", "NATS subject prefix")
	fs.StringVar(&c.Scenario, "scenario", "harbor", "scenario: "+strings.Join(scenarios.Names(), " or "))
	fs.StringVar(&c.Config, "config", "", "scenario YAML file (default: the built-in demo); "+configHelp)
	fs.IntVar(&c.Robots, "robots", 0, "fleet size (default: the file's or demo's own)")
	fs.DurationVar(&c.ConnectTimeout, "connect-timeout", 30*time.Second, "keep retrying an unreachable NATS server this long")
	fs.StringVar(&c.LogLevel, "log-level", "info", "debug, info, warn or error")
	fs.BoolVar(&c.LogJSON, "log-json", false, "log JSON lines")
}

// Parse parses a daemon's flags with its synopsis as help. It returns
// false with the exit code when the process should stop now (help asked,
// bad flags, stray arguments).
func Parse(fs *flag.FlagSet, synopsis string, args []string) (int, bool) {
	fs.Usage = func() {
		fmt.Fprint(fs.Output(), synopsis+"\nflags:\n")
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return 0, false
		}
		return 2, false
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(os.Stderr, "%s: unexpected argument %q (flags start with --)\n", fs.Name(), fs.Arg(0))
		return 2, false
	}
	return 0, true
}
