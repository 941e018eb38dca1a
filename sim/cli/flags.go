package cli

import (
	"errors"
	"flag"
	"fmt"
	"os"
	"strconv"
	"strings"

	"github.com/schollz/progressbar/v3"
	"golang.org/x/term"

	"baton/deploy/shell"
	"baton/sim/model"
	"baton/sim/scenarios"
)

// errUsage means the flag package already told the user what was wrong.
var errUsage = errors.New("usage")

// errInterrupted: the user stopped a run (Ctrl-C); exit 130 like a shell.
var errInterrupted = errors.New("interrupted")

func newFlags(name, synopsis string) *flag.FlagSet {
	fs := flag.NewFlagSet("sim "+name, flag.ContinueOnError)
	fs.Usage = func() {
		fmt.Fprintf(fs.Output(), "usage: sim %s [flags]\n\n%s\n\nscenarios:\n%s\nflags:\n", name, synopsis, scenarios.Help())
		shell.PrintDefaults(fs)
	}
	return fs
}

func parse(fs *flag.FlagSet, args []string) error {
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			os.Exit(0)
		}
		return errUsage
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(fs.Output(), "%s: unexpected argument %q\n", fs.Name(), fs.Arg(0))
		return errUsage
	}
	return nil
}

type scenarioFlags struct {
	name, file string
	robots     int
	starts     string
}

func (s *scenarioFlags) register(fs *flag.FlagSet) {
	fs.StringVar(&s.name, "scenario", "harbor", "scenario: "+strings.Join(scenarios.Names(), " or "))
	fs.StringVar(&s.file, "config", "", "scenario YAML file (default: the scenario's built-in demo)")
	fs.Var((*scenarios.Robots)(&s.robots), "robots", scenarios.RobotsUsage)
	fs.StringVar(&s.starts, "starts", "", scenarios.StartsUsage)
}

func (s *scenarioFlags) load() (model.Model, error) {
	return scenarios.LoadStarts(s.name, s.file, s.robots, s.starts)
}

// digest is the scenario digest daemons check (shell.DigestStarts).
func (s *scenarioFlags) digest(robots int) (string, error) {
	return shell.DigestStarts(s.name, s.file, robots, s.starts)
}

// parseOrder reads "2,0,1" into a turn order.
func parseOrder(s string) ([]int, error) {
	if s == "" {
		return nil, nil
	}
	var out []int
	for _, f := range strings.Split(s, ",") {
		v, err := strconv.Atoi(strings.TrimSpace(f))
		if err != nil {
			return nil, fmt.Errorf("--order: %q is not a robot number", f)
		}
		out = append(out, v)
	}
	return out, nil
}

// progress is a progress bar on stderr for a person watching a terminal,
// never into a pipe or file (nil then).
func progress(what string) func(done, total int) {
	if !term.IsTerminal(int(os.Stderr.Fd())) {
		return nil
	}
	var bar *progressbar.ProgressBar
	return func(done, total int) {
		if bar == nil {
			bar = progressbar.NewOptions(total, progressbar.OptionSetWriter(os.Stderr),
				progressbar.OptionSetDescription(what), progressbar.OptionClearOnFinish(),
				progressbar.OptionShowCount())
		}
		_ = bar.Set(done)
	}
}
