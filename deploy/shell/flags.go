package shell

import (
	"errors"
	"flag"
	"fmt"
	"os"
	"regexp"
	"strings"
	"time"

	"github.com/hashicorp/memberlist"
	"github.com/nats-io/nats.go"
	"go.uber.org/zap"

	pb "baton/proto"
	"baton/sim/model"
	"baton/sim/scenarios"
)

// Common are the flags agentd and the coordinator share, so the two
// spell and document them the same way.
type Common struct {
	NATS, Creds, Fleet, Prefix string
	GossipKeyFile              string
	TLSCA, TLSCert, TLSKey     string
	Scenario, Config           string
	Robots                     int
	Starts                     string
	ConnectTimeout             time.Duration
	LogLevel                   string
	LogJSON                    bool
}

// Register adds the shared flags to fs; configHelp says whose file must match.
func (c *Common) Register(fs *flag.FlagSet, configHelp string) {
	RegisterFleetFile(fs)
	c.RegisterBus(fs, "nats://127.0.0.1:4222", "NATS server URL list, comma-separated", "NATS credentials file")
	fs.StringVar(&c.GossipKeyFile, "gossip-key-file", "", "encrypt gossip with this key (base64 of 16, 24 or 32 bytes; the same for the whole fleet)")
	fs.StringVar(&c.Scenario, "scenario", "harbor", "scenario: "+strings.Join(scenarios.Names(), " or "))
	fs.StringVar(&c.Config, "config", "", "scenario YAML file (default: the built-in demo); "+configHelp)
	fs.Var((*scenarios.Robots)(&c.Robots), "robots", scenarios.RobotsUsage)
	fs.StringVar(&c.Starts, "starts", "", scenarios.StartsUsage)
	fs.DurationVar(&c.ConnectTimeout, "connect-timeout", 30*time.Second, "keep retrying an unreachable NATS server this long")
	fs.StringVar(&c.LogLevel, "log-level", "info", "debug, info, warn or error")
	fs.BoolVar(&c.LogJSON, "log-json", false, "log JSON lines")
}

// RegisterBus adds the flags that reach a fleet on the bus: --nats (with
// its default and help), --creds, TLS, --fleet and --prefix.
func (c *Common) RegisterBus(fs *flag.FlagSet, nats, natsHelp, credsHelp string) {
	fs.StringVar(&c.NATS, "nats", nats, natsHelp)
	fs.StringVar(&c.Creds, "creds", "", credsHelp)
	fs.StringVar(&c.TLSCA, "tls-ca", "", "CA certificate (PEM) to verify the NATS servers with; turns TLS on")
	fs.StringVar(&c.TLSCert, "tls-cert", "", "client certificate (PEM) for NATS servers that verify clients (with --tls-key)")
	fs.StringVar(&c.TLSKey, "tls-key", "", "client certificate's key (PEM)")
	fs.StringVar(&c.Fleet, "fleet", "demo", "fleet id")
	fs.StringVar(&c.Prefix, "prefix", "baton", "NATS subject prefix")
}

// Parse parses a daemon's flags with its synopsis as help. It returns
// false with the exit code when the process should stop now (help asked,
// bad flags, stray arguments).
func Parse(fs *flag.FlagSet, synopsis string, args []string) (int, bool) {
	fs.Usage = func() {
		fmt.Fprint(fs.Output(), synopsis+"\nflags:\n")
		PrintDefaults(fs)
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

// Fleet is what both daemons derive from the common flags.
type Fleet struct {
	Model    model.Fleet
	Subjects pb.Subjects
	Digest   string // scenario file and robot count, checked in every round start
}

// Load builds the scenario, the subjects and the digest.
func (c *Common) Load() (Fleet, error) {
	m, err := scenarios.LoadStarts(c.Scenario, c.Config, c.Robots, c.Starts)
	if err != nil {
		return Fleet{}, err
	}
	fm, ok := m.(model.Fleet)
	if !ok {
		return Fleet{}, fmt.Errorf("scenario %s cannot run as a fleet", m.Name())
	}
	subj, err := pb.NewSubjects(c.Prefix, c.Fleet)
	if err != nil {
		return Fleet{}, err
	}
	digest, err := DigestStarts(c.Scenario, c.Config, m.Robots(), c.Starts)
	if err != nil {
		return Fleet{}, err
	}
	return Fleet{Model: fm, Subjects: subj, Digest: digest}, nil
}

// Start makes a daemon's logger and its fail function: a start-up error is
// printed once, plainly (as a JSON log line when the logs are JSON), and
// the process exits 1.
func (c *Common) Start(name string) (*zap.Logger, func(error) int, error) {
	lg, err := Logger(c.LogLevel, c.LogJSON, name)
	if err != nil {
		return nil, nil, err
	}
	prog := strings.SplitN(name, "-", 2)[0]
	fail := func(err error) int {
		if c.LogJSON {
			lg.Error(prog+" cannot start", zap.Error(err))
		} else {
			fmt.Fprintf(os.Stderr, "%s: %v\n", prog, err)
		}
		return 1
	}
	return lg, fail, nil
}

// GossipOptions are the Gossip options the shared flags ask for (the
// encryption key).
func (c *Common) GossipOptions() ([]func(*memberlist.Config), error) {
	if c.GossipKeyFile == "" {
		return nil, nil
	}
	key, err := ReadGossipKey(c.GossipKeyFile)
	if err != nil {
		return nil, err
	}
	return []func(*memberlist.Config){WithGossipKey(key)}, nil
}

// TLSOptions are the NATS options the TLS flags ask for.
func (c *Common) TLSOptions() ([]nats.Option, error) {
	var opts []nats.Option
	for _, f := range []struct{ flag, path string }{{"--tls-ca", c.TLSCA}, {"--tls-cert", c.TLSCert}, {"--tls-key", c.TLSKey}} {
		if f.path == "" {
			continue
		}
		if _, err := os.Stat(f.path); err != nil {
			return nil, fmt.Errorf("%s: %w", f.flag, err)
		}
	}
	if (c.TLSCert == "") != (c.TLSKey == "") {
		return nil, errors.New("--tls-cert and --tls-key go together")
	}
	if c.TLSCA != "" {
		opts = append(opts, nats.RootCAs(c.TLSCA))
	}
	if c.TLSCert != "" {
		opts = append(opts, nats.ClientCert(c.TLSCert, c.TLSKey))
	}
	return opts, nil
}

// RegisterFleetFile adds --fleet-file, for help and to accept it: the file
// is read before the flags are parsed (ExpandFleetFile).
func RegisterFleetFile(fs *flag.FlagSet) {
	fs.String("fleet-file", "", "the fleet's file (YAML: deploy/examples/fleet.yaml) giving the fleet, NATS, scenario, robots, rounds, guesses and logs; flags given here override it")
}

// PrintDefaults is fs.PrintDefaults with every flag spelt as the docs spell
// it, --name (Go's flag package takes both; its help shows -name).
func PrintDefaults(fs *flag.FlagSet) {
	var b strings.Builder
	out := fs.Output()
	fs.SetOutput(&b)
	fs.PrintDefaults()
	fs.SetOutput(out)
	fmt.Fprint(out, flagLine.ReplaceAllString(b.String(), "  --"))
}

var flagLine = regexp.MustCompile(`(?m)^  -`)
