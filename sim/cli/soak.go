package cli

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"os"
	"os/signal"
	"strconv"
	"strings"
	"syscall"
	"time"

	"baton/agentd/decide"
	"baton/coordinator/clock"
	"baton/deploy/shell"
	"baton/sim/fault"
)

// soakSample is what the soak reads off every daemon at one point.
type soakSample struct {
	Round      int     `json:"round"`
	Seconds    float64 `json:"seconds"`
	Goroutines float64 `json:"max_goroutines"` // the largest of any daemon
	HeapMB     float64 `json:"max_heap_mb"`
	FDs        float64 `json:"max_open_fds"`
	LogKB      float64 `json:"decision_log_kb"`
	StreamKB   float64 `json:"durable_log_kb"` // the JetStream stream
	Records    uint64  `json:"durable_log_records"`
	Held       int     `json:"held_so_far"`
}

// gauge reads one unlabelled metric from a Prometheus text page.
func gauge(c *http.Client, url, name string) (float64, error) {
	resp, err := c.Get(url)
	if err != nil {
		return 0, err
	}
	defer resp.Body.Close()
	sc := bufio.NewScanner(io.LimitReader(resp.Body, 4<<20))
	for sc.Scan() {
		if rest, ok := strings.CutPrefix(sc.Text(), name+" "); ok {
			return strconv.ParseFloat(strings.TrimSpace(rest), 64)
		}
	}
	return 0, fmt.Errorf("%s: no %s", url, name)
}

// sample reads every daemon's goroutines, heap and descriptors.
func (f *fleetRun) sample(round int, t0 time.Time, held int) soakSample {
	s := soakSample{Round: round, Seconds: time.Since(t0).Seconds(), Held: held}
	urls := []string{"http://" + f.chttp + "/metrics"}
	for _, b := range f.bases {
		urls = append(urls, b+"/metrics")
	}
	for _, u := range urls {
		if v, err := gauge(f.client, u, "go_goroutines"); err == nil {
			s.Goroutines = max(s.Goroutines, v)
		}
		if v, err := gauge(f.client, u, "go_memstats_heap_alloc_bytes"); err == nil {
			s.HeapMB = max(s.HeapMB, v/(1<<20))
		}
		if v, err := gauge(f.client, u, "process_open_fds"); err == nil {
			s.FDs = max(s.FDs, v)
		}
	}
	if fi, err := os.Stat(f.decisionLog()); err == nil {
		s.LogKB = float64(fi.Size()) / 1024
	}
	if f.nc == nil {
		f.nc, _ = f.connect()
	}
	if f.nc != nil {
		ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
		if b, n, err := shell.JournalSize(ctx, f.nc, f.o.prefix, f.o.fleet); err == nil {
			s.StreamKB, s.Records = float64(b)/1024, n
		}
		cancel()
	}
	return s
}

// soak runs a process fleet for rounds rounds under 10% message loss and
// samples the daemons every `every` rounds.
func soak(ctx context.Context, o fleetOpts, rounds, every int, onSample func(soakSample)) ([]soakSample, error) {
	o.plan = &drillPlan{Seed: o.seed, Specs: []fault.Spec{{Kind: fault.Loss, P: 0.1}}}
	o.clock.Rounds = rounds + 10 // the coordinator stops soon after the software
	f, err := startFleet(ctx, o)
	if err != nil {
		return nil, err
	}
	defer f.close()
	t0 := time.Now()
	var out []soakSample
	held := 0
	for r := 1; r <= rounds; r++ {
		if ctx.Err() != nil {
			return out, fmt.Errorf("%w after %d rounds", errInterrupted, r-1)
		}
		held += f.play(r).Held
		if r == 1 || r%every == 0 || r == rounds {
			s := f.sample(r, t0, held)
			out = append(out, s)
			if onSample != nil {
				onSample(s)
			}
		}
	}
	return out, nil
}

func cmdSoak(args []string) error {
	fs := newFlags("soak", `Runs a whole fleet of real processes (embedded NATS, coordinator, one agentd
per robot) for many rounds under 10% message loss, and prints, over time,
the daemons' goroutines, heap and open file descriptors (the largest of
any daemon) and the decision log's size, as a file and as the durable JetStream
stream: what a long run leaks, if anything.`)
	var o fleetOpts
	o.sc.register(fs)
	rounds := fs.Int("rounds", 10000, "rounds to run")
	every := fs.Int("every", 500, "sample every this many rounds")
	seed := fs.Uint64("seed", 1, "run seed")
	asJSON := fs.Bool("json", false, "print the samples as JSON")
	logs := fs.String("logs", "", "directory for the daemons' logs (default: a temporary one)")
	if err := parse(fs, args); err != nil {
		return err
	}
	if *rounds < 1 || *every < 1 {
		return fmt.Errorf("--rounds %d --every %d: want both at least 1", *rounds, *every)
	}
	exe, err := os.Executable()
	if err != nil {
		return err
	}
	o.seed, o.exe, o.fleet, o.prefix = *seed, exe, "soak", "baton"
	o.clock = defaultSoakClock()
	o.logDir = *logs
	if o.logDir == "" {
		if o.logDir, err = os.MkdirTemp("", "baton-soak-"); err != nil {
			return err
		}
		defer os.RemoveAll(o.logDir)
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	if !*asJSON {
		fmt.Printf("%7s %8s %11s %8s %7s %9s %10s %6s\n", "round", "seconds", "goroutines", "heap MB", "fds", "log kB", "stream kB", "held")
	}
	samples, err := soak(ctx, o, *rounds, *every, func(s soakSample) {
		if !*asJSON {
			fmt.Printf("%7d %8.1f %11.0f %8.1f %7.0f %9.0f %10.0f %6d\n", s.Round, s.Seconds, s.Goroutines, s.HeapMB, s.FDs, s.LogKB, s.StreamKB, s.Held)
		}
	})
	if *asJSON && samples != nil {
		enc := json.NewEncoder(os.Stdout)
		enc.SetIndent("", "  ")
		if e := enc.Encode(samples); e != nil && err == nil {
			err = e
		}
	}
	return err
}

// defaultSoakClock is a light round: the soak is about what leaks, not
// about decisions.
func defaultSoakClock() clock.Config {
	c := clock.DefaultConfig()
	c.Decide = decide.Config{Samples: 4, Horizon: 6}
	c.TurnBudget = 100 * time.Millisecond
	return c
}
