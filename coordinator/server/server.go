// Package server is the coordinator's command line: flags, NATS (or an
// embedded server), gossip, the decision log, signals. coordinator's main
// calls Main; so does `sim coordinator`, for the simulator's fleets.
package server

import (
	"bufio"
	"context"
	"errors"
	"flag"
	"fmt"
	"net"
	"net/http"
	"os"
	"os/signal"
	"strconv"
	"syscall"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"go.uber.org/zap"

	"baton/coordinator/clock"
	"baton/coordinator/hub"
	"baton/coordinator/view"
	"baton/deploy/shell"
	"baton/signal/learn"
	"baton/sim/model"
)

const synopsis = `coordinator: Baton's round clock for one fleet.

It starts rounds, relays the fleet state built from the robots' reports,
keeps the turn order from live gossip membership (dead robots are skipped,
returning ones rejoin), and writes a decision log (one JSON line per round).

usage: coordinator [--embed-nats | --nats URL] [flags]
`

// Main runs the coordinator with args and returns the exit code.
func Main(args []string) int { return MainWith(args, shell.Hooks{}) }

// MainWith is Main with hooks (see shell.Hooks); only `sim` passes any.
func MainWith(args []string, hooks shell.Hooks) int {
	fs := flag.NewFlagSet("coordinator", flag.ContinueOnError)
	var c shell.Common
	c.Register(fs, "robots must use the same")
	cfg := clock.DefaultConfig()
	cfg.RegisterFlags(fs)
	cfg.RegisterSeed(fs)
	embed := fs.Bool("embed-nats", false, "run an embedded NATS server in this process (nothing else to install)")
	embedListen := fs.String("embed-listen", "127.0.0.1:4222", "address of the embedded NATS server")
	embedStore := fs.String("embed-store", "", "directory for the embedded server's JetStream files, kept across restarts (default: a temporary one, removed on exit)")
	logStream := fs.Bool("log-stream", true, "keep the durable decision log in a file-backed JetStream stream (<prefix>_<fleet>_log); needs JetStream on the server")
	logReplicas := fs.Int("log-replicas", 1, "copies of the durable log a JetStream cluster keeps (1..5; 3 on a three-node cluster)")
	logMB := fs.Int("log-max-mb", shell.DefaultJournalBytes>>20, "size of the durable log in MiB, reserved on the server; the oldest rounds go first beyond it")
	resume := fs.Bool("resume", true, "continue the round numbering from the durable log (false: a new episode from round 1; the log tells runs apart by epoch)")
	guessModel := fs.String("guess-model", "", "trained guess model file (sim train --out) to distribute to the robots through JetStream; watched for new versions")
	logFile := fs.String("decision-log", "", "append one JSON line per round to this file")
	httpAddr := fs.String("http", "127.0.0.1:7480", "address of /healthz, /metrics and the fleet view /view (the site, every robot's move, guesses and holds, live)")
	gossip := fs.String("gossip", "127.0.0.1:7946", "gossip bind host:port that robots --join")
	if hooks.Flags != nil {
		hooks.Flags(fs)
	}
	args, err := shell.ExpandFleetFile(args, shell.RoleCoordinator)
	if err != nil {
		fmt.Fprintln(os.Stderr, "coordinator:", err)
		return 2
	}
	if code, ok := shell.Parse(fs, synopsis, args); !ok {
		return code
	}
	if hooks.Parsed != nil {
		if err := hooks.Parsed(); err != nil {
			fmt.Fprintln(os.Stderr, "coordinator:", err)
			return 2
		}
	}
	lg, fail, err := c.Start("coordinator")
	if err != nil {
		fmt.Fprintln(os.Stderr, "coordinator:", err)
		return 2
	}
	defer lg.Sync()
	fl, err := c.Load()
	if err != nil {
		return fail(err)
	}
	m := fl.Model
	cfg.Fleet, cfg.Model, cfg.Digest = c.Fleet, m, fl.Digest
	if err := cfg.Validate(); err != nil {
		return fail(err)
	}
	url := c.NATS
	natsSet := false
	fs.Visit(func(f *flag.Flag) { natsSet = natsSet || f.Name == "nats" })
	if *embed && natsSet {
		return fail(fmt.Errorf("--embed-nats and --nats: choose one (the embedded server or an existing one)"))
	}
	if *embed {
		host, portStr, err := net.SplitHostPort(*embedListen)
		if err != nil {
			return fail(fmt.Errorf("--embed-listen %q: %w", *embedListen, err))
		}
		port, err := strconv.Atoi(portStr)
		if err != nil || port < 0 || port > 65535 {
			return fail(fmt.Errorf("--embed-listen %q: bad port", *embedListen))
		}
		ns, u, err := shell.EmbeddedNATSAt(host, port, *embedStore)
		if err != nil {
			return fail(err)
		}
		defer ns.Shutdown()
		url = u
		lg.Info("embedded NATS server up", zap.String("url", u))
	}
	reg := prometheus.NewRegistry()
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	met := hub.NewMetrics(reg)
	tlsOpts, err := c.TLSOptions()
	if err != nil {
		return fail(err)
	}
	nc, err := shell.Connect(url, c.Creds, "coordinator-"+c.Fleet, c.ConnectTimeout, lg,
		append(tlsOpts, shell.ClientErrors(lg, func(kind string) { met.NATSErrors.WithLabelValues(kind).Inc() }))...)
	if err != nil {
		return fail(err)
	}
	defer nc.Close()
	gopts, err := c.GossipOptions()
	if err != nil {
		return fail(err)
	}
	ml, err := shell.Gossip(shell.Incarnation(c.Fleet+"/coordinator"), *gossip, nil, lg, gopts...)
	if err != nil {
		return fail(err)
	}
	defer ml.Shutdown()

	var logW *bufio.Writer
	if *logFile != "" {
		f, err := os.OpenFile(*logFile, os.O_CREATE|os.O_WRONLY|os.O_APPEND, 0o644)
		if err != nil {
			return fail(fmt.Errorf("--decision-log: %w", err))
		}
		defer f.Close()
		logW = bufio.NewWriter(f)
		defer logW.Flush()
	}
	if *logReplicas < 1 || *logReplicas > 5 {
		return fail(fmt.Errorf("--log-replicas %d: want 1..5", *logReplicas))
	}
	if *logMB < 1 || *logMB > 1<<20 {
		return fail(fmt.Errorf("--log-max-mb %d: want 1..1048576", *logMB))
	}
	var journal *shell.Journal
	if *logStream {
		jctx, cancel := context.WithTimeout(context.Background(), 15*time.Second)
		journal, err = shell.OpenJournal(jctx, nc, c.Prefix, c.Fleet, shell.JournalOptions{Replicas: *logReplicas, MaxBytes: int64(*logMB) << 20})
		var epoch, last uint64
		if err == nil && *resume {
			epoch, last, err = journal.LastClosed(jctx)
		}
		cancel()
		if err != nil {
			return fail(fmt.Errorf("--log-stream: %w (--log-stream=false keeps only --decision-log)", err))
		}
		cfg.Resume = last
		if last > 0 {
			lg.Info("continuing the fleet's rounds from the durable log", zap.Uint64("last_closed_round", last),
				zap.Uint64("by_epoch", epoch), zap.String("stream", shell.JournalStream(c.Prefix, c.Fleet)))
		}
	}
	hcfg := hub.Config{Clock: cfg, Subjects: fl.Subjects, Alive: func() []int { return shell.AliveRobots(ml, c.Fleet) },
		Log: lg, Metrics: met}
	if logW != nil {
		hcfg.DecisionLog = logW
	}
	if journal != nil {
		hcfg.Journal = journal
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	ln, err := net.Listen("tcp", *httpAddr)
	if err != nil {
		return fail(fmt.Errorf("--http %s: %w", *httpAddr, err))
	}
	mux := http.NewServeMux()
	mux.Handle("GET /metrics", promhttp.HandlerFor(reg, promhttp.HandlerOpts{}))
	// The fleet view: every filed round drawn (coordinator/view).
	if site, err := view.NewSite(c.Fleet, m); err == nil {
		live, err := view.NewLive(site)
		if err != nil {
			return fail(err)
		}
		vh := live.Handler()
		mux.Handle("/view", vh)
		mux.Handle("/view/", vh)
		hcfg.OnRound = func(r clock.Record) {
			if f, err := view.FrameOf(m, r); err == nil {
				live.Add(f)
			} else {
				lg.Warn("the view cannot draw the round", zap.Uint64("round", r.Round), zap.Error(err))
			}
		}
	}
	mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, _ *http.Request) {
		if !nc.IsConnected() {
			http.Error(w, "not connected to NATS", http.StatusServiceUnavailable)
			return
		}
		fmt.Fprintf(w, "ok fleet %s, %d robots alive\n", c.Fleet, len(shell.AliveRobots(ml, c.Fleet)))
	})
	srv := &http.Server{Handler: mux, ReadHeaderTimeout: 5 * time.Second}
	go func() { _ = srv.Serve(ln) }()
	defer srv.Close()
	var bus shell.Bus = shell.NATSBus{Conn: nc}
	if hooks.Bus != nil {
		wrapped, closeBus, err := hooks.Bus(bus, -1, fl.Subjects)
		if err != nil {
			return fail(err)
		}
		defer closeBus()
		bus = wrapped
	}
	hb := hub.New(hcfg, bus)
	lg.Info("coordinator up", zap.String("fleet", c.Fleet), zap.String("scenario", m.Name()), zap.Int("robots", m.Robots()),
		zap.String("nats", nc.ConnectedUrl()), zap.String("gossip", *gossip), zap.String("mode", clock.ModeName(cfg)),
		zap.String("guess", cfg.Guess), zap.String("digest", fl.Digest), zap.Uint64("epoch", hb.Epoch()))
	if *guessModel != "" {
		pub := &modelPublisher{file: *guessModel, m: m, nc: nc, bucket: shell.ModelBucket(c.Prefix, c.Fleet), hub: hb, lg: lg}
		if err := pub.check(ctx); err != nil {
			return fail(fmt.Errorf("--guess-model: %w", err))
		}
		go pub.watch(ctx)
	} else if cfg.Guess == "learned" || cfg.Guess == "checked" {
		const msg = "without --guess-model: robots guess with whatever model they were started with, or the base policy (train one: sim train --out FILE)"
		lg.Warn("--guess " + cfg.Guess + " " + msg)
		if !c.LogJSON {
			fmt.Fprintf(os.Stderr, "coordinator: warning: --guess %s %s\n", cfg.Guess, msg)
		}
	}
	if err := hb.Run(ctx); err != nil && !errors.Is(err, context.Canceled) {
		return fail(err)
	}
	lg.Info("coordinator stopped")
	return 0
}

// modelPublisher keeps the fleet's guess model in the object store: it
// publishes the file's version at start and again whenever the file changes
// to a valid model with a higher version. A bad file is reported and the
// version in use stays.
type modelPublisher struct {
	file    string
	m       model.Model
	nc      *nats.Conn
	bucket  string
	hub     *hub.Hub
	lg      *zap.Logger
	version uint64
	stamp   time.Time
	size    int64
}

func (p *modelPublisher) check(ctx context.Context) error {
	fi, err := os.Stat(p.file)
	if err != nil {
		return err
	}
	if fi.ModTime().Equal(p.stamp) && fi.Size() == p.size {
		return nil
	}
	p.stamp, p.size = fi.ModTime(), fi.Size()
	data, err := os.ReadFile(p.file)
	if err != nil {
		return err
	}
	_, meta, err := learn.Check(data, p.m)
	if err != nil {
		return err
	}
	if meta.Version == 0 {
		return fmt.Errorf("%s has version 0; write it with sim train --out (versions start at 1)", p.file)
	}
	if meta.Version <= p.version {
		return fmt.Errorf("%s changed but its version %d is not above %d in use; write new models with a higher version", p.file, meta.Version, p.version)
	}
	pctx, cancel := context.WithTimeout(ctx, 10*time.Second)
	defer cancel()
	if err := shell.PublishModel(pctx, p.nc, p.bucket, meta.Version, data); err != nil {
		return err
	}
	p.version = meta.Version
	p.hub.SetModelVersion(meta.Version)
	p.lg.Info("guess model published", zap.String("file", p.file), zap.Uint64("version", meta.Version),
		zap.String("bucket", p.bucket), zap.Float64("test_accuracy", meta.TestAccuracy))
	return nil
}

func (p *modelPublisher) watch(ctx context.Context) {
	t := time.NewTicker(2 * time.Second)
	defer t.Stop()
	said := ""
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
			err := p.check(ctx)
			if err != nil && err.Error() != said {
				p.lg.Error("new guess model refused; robots keep the one in use", zap.String("file", p.file),
					zap.Uint64("in_use", p.version), zap.Error(err))
			}
			said = "" // the same problem is logged once, until it changes
			if err != nil {
				said = err.Error()
			}
		}
	}
}
