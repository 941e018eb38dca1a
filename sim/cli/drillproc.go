package cli

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"time"

	"baton/signal/learn"
	"baton/sim/drill"
	"baton/sim/fault"
)

// processRunner runs a drill's jobs as real fleets: the embedded NATS
// server, the coordinator and one agentd per robot, as `sim fleet` starts
// them, with the fault layer in every daemon and process faults carried
// out for real (SIGKILL, server shutdown, the TCP fault proxy).
type processRunner struct {
	exe    string
	logDir string // "" : a temporary directory, removed after a run that went well
	runs   int
}

func (p *processRunner) RunProcess(ctx context.Context, j drill.Job) (drill.Episode, error) {
	d := j.Drill
	p.runs++
	dir := p.logDir
	keep := dir != ""
	if dir == "" {
		var err error
		if dir, err = os.MkdirTemp("", "baton-drill-"); err != nil {
			return drill.Episode{}, err
		}
	}
	sub := filepath.Join(dir, fmt.Sprintf("run-%03d", p.runs))
	var msg, procs []fault.Spec
	for _, s := range j.Faults {
		switch {
		case s.Kind.Process():
			procs = append(procs, s)
		case s.Kind == fault.Slow:
			// A real daemon computes as fast as it does; its turn's result
			// leaves late instead, which is what its peers see.
			msg = append(msg, slowAsDelay(s, d.Model.Robots())...)
		default:
			msg = append(msg, s)
		}
	}
	c := j.Clock
	c.Rounds = 0 // the runner plays d.Rounds rounds of the software; runs restart their numbering
	o := fleetOpts{sc: scenarioFlags{name: d.Scenario, file: d.Site, robots: d.Model.Robots()}, clock: c, seed: d.Seed,
		world: j.World, fleet: "drill", prefix: "baton", logDir: sub, exe: p.exe,
		proxy: slices.ContainsFunc(procs, func(s fault.Spec) bool { return s.Kind == fault.Stall || s.Kind == fault.Reset })}
	o.clock.Rounds = d.Rounds // the numbering goes on across coordinator restarts
	if len(msg) > 0 {
		o.plan = &drillPlan{Seed: j.FaultSeed, Specs: msg}
	}
	if net, ok := j.Guesses.Classifier.(*learn.Net); ok && j.Point.Guess == "learned" {
		if err := os.MkdirAll(sub, 0o755); err != nil {
			return drill.Episode{}, err
		}
		o.guessModel = filepath.Join(sub, "guess.gm")
		if err := net.Save(o.guessModel, 1); err != nil {
			return drill.Episode{}, err
		}
	}
	f, err := startFleet(ctx, o)
	if err != nil {
		return drill.Episode{}, fmt.Errorf("%s: %w (logs in %s)", j.Point.Name(), err, sub)
	}
	ep, err := p.play(ctx, f, d.Rounds, procs)
	if err == nil {
		// No round lost or logged twice, across coordinator restarts:
		// the durable log runs on 1, 2, 3...
		var res replayResult
		if res, err = f.replay(); err == nil && !res.Continuous() {
			err = fmt.Errorf("durable decision log: %s", res.Summary())
		}
		if err == nil {
			ep.Events = append(ep.Events, "durable decision log: "+res.Summary())
		}
	}
	f.close()
	if f.planFile != "" {
		ep.Faults = planStats(f.planFile)
	}
	if err != nil {
		return ep, fmt.Errorf("%s: %w (logs in %s)", j.Point.Name(), err, sub)
	}
	if !keep {
		os.RemoveAll(dir)
	}
	return ep, nil
}

// play runs rounds rounds of the robots' software, carrying out each
// process fault before its round. A killed robot comes back once its
// down time has passed (the fleet plays on meanwhile, the robot held); a
// killed coordinator or server is restarted before play goes on.
func (p *processRunner) play(ctx context.Context, f *fleetRun, rounds int, procs []fault.Spec) (drill.Episode, error) {
	var ep drill.Episode
	type down struct {
		robot int
		until time.Time
	}
	var dead []down
	t0 := time.Now()
	note := func(format string, args ...any) {
		ep.Events = append(ep.Events, fmt.Sprintf("%6.1fs ", time.Since(t0).Seconds())+fmt.Sprintf(format, args...))
	}
	for r := 1; r <= rounds; r++ {
		if err := ctx.Err(); err != nil {
			return ep, err
		}
		for i := 0; i < len(dead); i++ {
			if time.Now().After(dead[i].until) {
				if err := f.restart(ctx, dead[i].robot); err != nil {
					return ep, fmt.Errorf("restarting robot %d: %w", dead[i].robot, err)
				}
				note("round %d: robot %d restarted", r, dead[i].robot)
				dead = slices.Delete(dead, i, i+1)
				i--
			}
		}
		restarted := false // the coordinator, mid-round
		for _, s := range procs {
			if s.From != r {
				continue
			}
			switch s.Kind {
			case fault.KillRobot:
				for _, id := range s.Robots {
					f.kill(id)
					dead = append(dead, down{id, time.Now().Add(s.Down)})
					note("round %d: robot %d killed (SIGKILL), back after %s", r, id, s.Down)
				}
			case fault.KillCoordinator:
				// Killed mid-round: the robots' software has the round's
				// decisions, the coordinator dies waiting for the reports
				// (which then go to its successor).
				down := s.Down
				f.beforeReport = func() error {
					note("round %d: decisions read; coordinator killed (SIGKILL) before the reports, back after %s", r, down)
					if err := f.restartCoordinator(ctx, down); err != nil {
						return fmt.Errorf("restarting the coordinator: %w", err)
					}
					restarted = true
					return nil
				}
			case fault.KillNATS:
				note("round %d: NATS server stopped, back after %s", r, s.Down)
				if err := f.restartNATS(s.Down); err != nil {
					return ep, err
				}
				note("round %d: NATS server back", r)
			case fault.Stall:
				f.tcp.Stall(s.Down)
				note("round %d: robots' NATS connections stalled for %s", r, s.Down)
			case fault.Reset:
				f.tcp.Reset()
				note("round %d: robots' NATS connections reset", r)
			}
		}
		res := f.play(r)
		if f.hookErr != nil {
			return ep, f.hookErr
		}
		if restarted {
			// The reports of round r went to the new coordinator, which
			// waits for them before its first round.
			if err := f.waitNewRun(30 * time.Second); err != nil {
				return ep, err
			}
			note("round %d: coordinator back; its run continues the rounds from the durable log", r)
		}
		for i, u := range res.Decided {
			if u >= 0 && slices.ContainsFunc(dead, func(x down) bool { return x.robot == i }) {
				return ep, fmt.Errorf("round %d: robot %d is dead but decided", r, i)
			}
		}
		ep.Rounds = append(ep.Rounds, res)
	}
	return ep, nil
}

// slowAsDelay turns a slow-turn fault into delays on every link out of
// the slow robots, for the same rounds.
func slowAsDelay(s fault.Spec, robots int) []fault.Spec {
	var out []fault.Spec
	for r := range robots {
		if len(s.Robots) > 0 && !slices.Contains(s.Robots, r) {
			continue
		}
		d := fault.Spec{Kind: fault.Delay, From: s.From, Until: s.Until, Delay: fault.Jitter{Fixed: s.Slow}}
		for to := fault.Coordinator; to < robots; to++ {
			if to != r {
				d.Links = append(d.Links, [2]int{r, to})
			}
		}
		out = append(out, d)
	}
	return out
}
