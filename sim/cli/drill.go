package cli

import (
	"context"
	"fmt"
	"io"
	"os"
	"os/signal"
	"path/filepath"
	"runtime"
	"strings"
	"syscall"
	"time"

	"baton/coordinator/clock"
	"baton/coordinator/view"
	"baton/sim/drill"
	"baton/sim/drill/result"
	"baton/sim/fault"
	"baton/sim/model"
)

func cmdDrill(args []string) (err error) {
	fs := newFlags("drill", `Run a drill file: fleets through scheduled faults (message loss, bursty loss,
delays, partitions, slow robots; killed daemons, coordinator or NATS server;
stalled and reset connections), every configuration of its sweep on the same
seeded episodes, and report what each configuration costs against the base
policy and fault-free sequential rollout.

  sim drill --file deploy/examples/drill-harbor.yaml --json out.json --html out.html`)
	file := fs.String("file", "", "drill file (YAML; see deploy/examples/drill-*.yaml)")
	jsonOut := fs.String("json", "", "write the report as JSON to this file")
	htmlOut := fs.String("html", "", "write the report as one self-contained HTML page to this file")
	replaysN := fs.Int("replays", 5, "with --html: replay pages (FILE-worst-N.html, linked from the report) of the worst episode of this many configurations, those with the highest mean cost (virtual drills)")
	workers := fs.Int("workers", runtime.NumCPU(), "configurations run at once (virtual-time drills)")
	episodes := fs.Int("episodes", 0, "episodes per configuration (0: the file's)")
	logs := fs.String("logs", "", "process drills: directory for the daemons' logs (default: a temporary one)")
	noGossip := fs.Bool("no-gossip", false, "skip measuring membership (false-dead robots) under each link fault")
	if err := parse(fs, args); err != nil {
		return err
	}
	if *file == "" {
		fmt.Fprintln(fs.Output(), "sim drill: --file is required")
		fs.Usage()
		return errUsage
	}
	if *replaysN < 0 || *replaysN > 1000 {
		return fmt.Errorf("--replays %d: want 0..1000", *replaysN)
	}
	if *workers < 1 || *workers > 256 {
		return fmt.Errorf("--workers %d: want 1..256", *workers)
	}
	d, err := drill.Load(*file)
	if err != nil {
		return err
	}
	if *episodes != 0 {
		if *episodes < 2 || *episodes > drill.MaxEpisodes {
			return fmt.Errorf("--episodes %d: want 2..%d", *episodes, drill.MaxEpisodes)
		}
		d.Episodes = *episodes
	}
	for _, out := range []string{*jsonOut, *htmlOut} {
		if out != "" {
			// Fail before the drill runs, not after, and leave nothing
			// behind if it then fails.
			if err := writable(out); err != nil {
				return fmt.Errorf("report file: %w", err)
			}
		}
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	o := drill.Options{Workers: *workers, Now: time.Now}
	if d.Process() {
		exe, err := os.Executable()
		if err != nil {
			return err
		}
		o.Processes = &processRunner{exe: exe, logDir: *logs}
	}
	if !*noGossip {
		o.Gossip = measureGossip
	}
	o.Progress = progress("fleet runs")
	var replays []string // written beside the page; removed if the drill fails
	if *htmlOut != "" {
		if fm := d.Model; *replaysN > 0 {
			o.Replays = *replaysN
			base := strings.TrimSuffix(*htmlOut, filepath.Ext(*htmlOut))
			o.Worst = func(c result.Config, recs []clock.Record) (string, error) {
				name := fmt.Sprintf("%s-worst-%d.html", base, len(replays)+1)
				if err := writeWorstReplay(name, fm, d.Name, c, recs); err != nil {
					return "", err
				}
				replays = append(replays, name)
				return filepath.Base(name), nil
			}
		}
	}
	defer func() {
		if err != nil {
			for _, r := range replays {
				os.Remove(r)
			}
		}
	}()
	rep, err := drill.Run(ctx, d, o)
	if err != nil {
		if ctx.Err() != nil {
			return fmt.Errorf("%w: %v", errInterrupted, err)
		}
		return err
	}
	if err := rep.Table(os.Stdout); err != nil {
		return err
	}
	if *jsonOut != "" {
		if err := writeReport(*jsonOut, rep.WriteJSON); err != nil {
			return err
		}
		fmt.Printf("report %s\n", *jsonOut)
	}
	if *htmlOut != "" {
		if err := writeReport(*htmlOut, rep.HTML); err != nil {
			return err
		}
		fmt.Printf("page %s\n", *htmlOut)
	}
	return nil
}

// writable checks a report can be written at path without writing it.
func writable(path string) error {
	target, special, err := reportTarget(path)
	if err != nil {
		return err
	}
	if special {
		// Only ask: opening a pipe here would wait for its reader.
		if err := syscall.Access(target, 2 /* W_OK */); err != nil {
			return fmt.Errorf("%s: %w", path, err)
		}
		return nil
	}
	f, err := os.CreateTemp(filepath.Dir(target), ".baton-report-*")
	if err != nil {
		return fmt.Errorf("%s: %w", path, err)
	}
	f.Close()
	return os.Remove(f.Name())
}

// reportTarget follows symlinks; special is true for an existing file
// that is not a regular one (a device, a pipe), which is written in place.
func reportTarget(path string) (target string, special bool, err error) {
	target = path
	if t, err := filepath.EvalSymlinks(path); err == nil {
		target = t
	} else if l, err := os.Readlink(path); err == nil {
		// A link to a file not made yet: make it there.
		if !filepath.IsAbs(l) {
			l = filepath.Join(filepath.Dir(path), l)
		}
		target = l
	}
	fi, err := os.Stat(target)
	switch {
	case err == nil && fi.IsDir():
		return "", false, fmt.Errorf("%s is a directory", path)
	case err == nil && !fi.Mode().IsRegular():
		return target, true, nil
	}
	return target, false, nil
}

// writeReport writes a regular file through a temporary one renamed into
// place, so a failed write leaves no half report behind; a device or pipe
// is written directly.
func writeReport(path string, write func(w io.Writer) error) error {
	target, special, err := reportTarget(path)
	if err != nil {
		return err
	}
	if special {
		f, err := os.OpenFile(target, os.O_WRONLY, 0)
		if err != nil {
			return fmt.Errorf("report file: %w", err)
		}
		if err := write(f); err != nil {
			f.Close()
			return fmt.Errorf("writing %s: %w", path, err)
		}
		if err := f.Close(); err != nil {
			return fmt.Errorf("writing %s: %w", path, err)
		}
		return nil
	}
	path = target
	tmp := path + ".tmp"
	f, err := os.Create(tmp)
	if err != nil {
		return fmt.Errorf("report file: %w", err)
	}
	if err := write(f); err != nil {
		f.Close()
		os.Remove(tmp)
		return fmt.Errorf("writing %s: %w", path, err)
	}
	if err := f.Close(); err != nil {
		os.Remove(tmp)
		return fmt.Errorf("writing %s: %w", path, err)
	}
	return os.Rename(tmp, path)
}

// gossipWatch is how long each membership measurement watches.
const gossipWatch = 8 * time.Second

// measureGossip runs the fleet's gossip (real memberlist nodes on
// loopback, the daemons' settings) through the drill's link faults and
// counts robots declared dead while alive. Only message faults apply, as
// in round 1 of the drill; the count is the same for every configuration
// that shares the link faults.
func measureGossip(ctx context.Context, robots int, specs []fault.Spec) (int, error) {
	var msg []fault.Spec
	for _, s := range specs {
		if !s.Kind.Process() && s.Kind != fault.Slow {
			msg = append(msg, s)
		}
	}
	res, err := fault.MeasureGossip(ctx, fault.GossipRun{Nodes: robots, Specs: msg, Seed: 1, Duration: gossipWatch})
	if err != nil {
		return 0, err
	}
	return res.FalseDead, nil
}

// writeWorstReplay writes the replay page of a drill configuration's worst
// episode.
func writeWorstReplay(path string, m model.Fleet, drillName string, c result.Config, recs []clock.Record) error {
	site, err := view.NewSite("drill", m)
	if err != nil {
		return err
	}
	site.Mode, site.Source = "replay", fmt.Sprintf("drill %s, %s, episode %d", drillName, c.Name, c.WorstEpisode)
	site.Summary = map[string]any{"drill": drillName, "config": c.Name, "episode": c.WorstEpisode,
		"episode_cost": c.EpisodeCosts[c.WorstEpisode], "config_mean_cost": c.MeanCost, "rounds": len(recs),
		"faults": c.Faults}
	frames := make([]view.Frame, 0, len(recs))
	for _, r := range recs {
		f, err := view.FrameOf(m, r)
		if err != nil {
			return err
		}
		frames = append(frames, f)
	}
	return writeReplayHTML(path, site, frames)
}
