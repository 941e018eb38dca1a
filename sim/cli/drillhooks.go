package cli

import (
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"strings"

	"baton/agentd/turn"
	"baton/deploy/shell"
	pb "baton/proto"
	"baton/sim/fault"
)

// DrillEnv must be set to 1 in a daemon's environment for it to accept
// --drill-faults: the harness sets it; a daemon started by hand by
// mistake with the flag refuses to run. The production binaries
// (./agentd, ./coordinator) do not have the flag at all.
const DrillEnv = "BATON_DRILL"

// drillPlan is the file --drill-faults names: the fault layer's seed and
// schedule, shared by every daemon of a drilled fleet.
type drillPlan struct {
	Seed  uint64       `json:"seed"`
	Specs []fault.Spec `json:"specs"`
}

// drillHooks give `sim agentd` and `sim coordinator` the --drill-faults
// flag, which puts the fault layer between the daemon and its bus.
func drillHooks() shell.Hooks {
	var file string
	var plan drillPlan
	return shell.Hooks{
		Flags: func(fs *flag.FlagSet) {
			fs.StringVar(&file, "drill-faults", "", "drills only (set by sim drill and sim fleet, with "+DrillEnv+"=1): fault layer plan file")
		},
		Parsed: func() error {
			if file == "" {
				return nil
			}
			if os.Getenv(DrillEnv) != "1" {
				return errors.New("--drill-faults is for fleets that sim drill or sim fleet start (they set " + DrillEnv + "=1); refusing to lose messages on purpose")
			}
			var err error
			plan, err = readPlan(file)
			return err
		},
		Bus: func(b shell.Bus, self int, subjects pb.Subjects) (shell.Bus, func(), error) {
			if file == "" {
				return b, func() {}, nil
			}
			p := plan
			fb := fault.NewBus(b, subjects, self, p.Seed, p.Specs)
			closeBus := func() {
				fb.Close()
				// What this daemon's layer did, for the drill's report (a
				// daemon killed outright writes nothing).
				if line, err := json.Marshal(fb.Stats()); err == nil {
					if f, err := os.OpenFile(file+".stats", os.O_APPEND|os.O_CREATE|os.O_WRONLY, 0o644); err == nil {
						f.Write(append(line, '\n'))
						f.Close()
					}
				}
			}
			return fb, closeBus, nil
		},
	}
}

func readPlan(file string) (drillPlan, error) {
	var p drillPlan
	f, err := os.Open(file)
	if err != nil {
		return p, fmt.Errorf("--drill-faults: %w", err)
	}
	defer f.Close()
	data, err := io.ReadAll(io.LimitReader(f, 1<<20+1))
	if err != nil || len(data) > 1<<20 {
		return p, fmt.Errorf("--drill-faults %s: unreadable or over 1 MiB", file)
	}
	if err := json.Unmarshal(data, &p); err != nil {
		return p, fmt.Errorf("--drill-faults %s: %w", file, err)
	}
	for i, s := range p.Specs {
		if err := s.Check(turn.MaxRobots, 0); err != nil {
			return p, fmt.Errorf("--drill-faults %s: fault %d: %w", file, i+1, err)
		}
	}
	return p, nil
}

// writePlan writes a plan file for a fleet's daemons.
func writePlan(file string, p drillPlan) error {
	data, err := json.Marshal(p)
	if err != nil {
		return err
	}
	return os.WriteFile(file, data, 0o644)
}

// planStats sums what the daemons' fault layers wrote on exit.
func planStats(file string) fault.Stats {
	var sum fault.Stats
	data, err := os.ReadFile(file + ".stats")
	if err != nil {
		return sum
	}
	for _, line := range strings.Split(string(data), "\n") {
		var s fault.Stats
		if json.Unmarshal([]byte(line), &s) != nil {
			continue
		}
		sum.Delivered += s.Delivered
		sum.Dropped += s.Dropped
		sum.Duplicated += s.Duplicated
		sum.Delayed += s.Delayed
		sum.Reordered += s.Reordered
		sum.Partitioned += s.Partitioned
	}
	return sum
}
