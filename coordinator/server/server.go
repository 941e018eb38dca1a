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
	"slices"
	"strconv"
	"strings"
	"syscall"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"go.uber.org/zap"

	"baton/agentd/turn"
	"baton/coordinator/hub"
	"baton/deploy/shell"
	pb "baton/proto"
	bsignal "baton/signal"
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
func Main(args []string) int {
	fs := flag.NewFlagSet("coordinator", flag.ContinueOnError)
	var c shell.Common
	c.Register(fs, "robots must use the same")
	embed := fs.Bool("embed-nats", false, "run an embedded NATS server in this process (nothing else to install)")
	embedListen := fs.String("embed-listen", "127.0.0.1:4222", "address of the embedded NATS server")
	seed := fs.Uint64("seed", 1, "fleet seed for every robot's Monte Carlo")
	samples := fs.Int("samples", 16, "Monte Carlo samples per Q-factor")
	horizon := fs.Int("horizon", 20, "base-policy steps simulated after the first step")
	termCost := fs.Bool("terminal-cost", false, "add the scenario's cost-to-go estimate at truncation")
	modeName := fs.String("mode", "hybrid", "sequential, parallel or hybrid")
	guessModel := fs.String("guess-model", "", "trained guess model file (sim train --out) to distribute to the robots through JetStream; watched for new versions")
	guess := fs.String("guess", "base", "the fleet's guess source for missing predecessors: "+strings.Join(bsignal.Names(), ", "))
	autoParallel := fs.Bool("auto-parallel", false, "switch rounds to parallel when measured links are too slow for --period")
	turnDeadline := fs.Duration("turn-deadline", 200*time.Millisecond, "time each turn gets; turn k is due (k+1) x this after the round starts")
	period := fs.Duration("period", 0, "start rounds at most this often (0: as soon as the previous round's reports are in)")
	rounds := fs.Int("rounds", 0, "stop after this many rounds (0: run until stopped)")
	reportWait := fs.Duration("report-wait", 2*time.Second, "how long to wait for robots' reports after a round")
	orderFlag := fs.String("order", "", "preferred turn order, e.g. 2,0,1 (default 0..m-1)")
	logFile := fs.String("decision-log", "", "append one JSON line per round to this file")
	httpAddr := fs.String("http", "127.0.0.1:7480", "healthz and metrics address")
	gossip := fs.String("gossip", "127.0.0.1:7946", "gossip bind host:port that robots --join")
	if code, ok := shell.Parse(fs, synopsis, args); !ok {
		return code
	}
	lg, fail, err := c.Start("coordinator")
	if err != nil {
		fmt.Fprintln(os.Stderr, "coordinator:", err)
		return 2
	}
	defer lg.Sync()
	mode, ok := turn.ParseMode(*modeName)
	if !ok {
		return fail(fmt.Errorf("--mode %q: use sequential, parallel or hybrid", *modeName))
	}
	if !slices.Contains(bsignal.Names(), *guess) {
		return fail(fmt.Errorf("--guess %q: use one of %s", *guess, strings.Join(bsignal.Names(), ", ")))
	}
	if *turnDeadline <= 0 {
		return fail(fmt.Errorf("--turn-deadline must be positive, got %s", *turnDeadline))
	}
	if *samples < 1 || *horizon < 0 {
		return fail(fmt.Errorf("--samples must be >= 1 and --horizon >= 0"))
	}
	fl, err := c.Load()
	if err != nil {
		return fail(err)
	}
	m := fl.Model
	order, err := parseOrder(*orderFlag, m.Robots())
	if err != nil {
		return fail(err)
	}
	subj, digest := fl.Subjects, fl.Digest
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
		port, _ := strconv.Atoi(portStr)
		ns, u, err := shell.EmbeddedNATS(host, port)
		if err != nil {
			return fail(err)
		}
		defer ns.Shutdown()
		url = u
		lg.Info("embedded NATS server up", zap.String("url", u))
	}
	nc, err := shell.Connect(url, c.Creds, "coordinator-"+c.Fleet, c.ConnectTimeout, lg)
	if err != nil {
		return fail(err)
	}
	defer nc.Close()
	ml, err := shell.Gossip(c.Fleet+"/coordinator", *gossip, nil, lg)
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
	reg := prometheus.NewRegistry()
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	h := int32(*horizon)
	if h == 0 {
		h = -1 // 0 means "first step only" on the wire, not decide's default
	}
	cfg := hub.Config{Fleet: c.Fleet, Subjects: subj, Model: m, Digest: digest, Mode: mode, Guess: *guess,
		Params:     &pb.DecideParams{Samples: uint32(*samples), Horizon: h, TerminalCost: *termCost, FleetSeed: *seed},
		TurnBudget: *turnDeadline, Period: *period, Rounds: *rounds, ReportWait: *reportWait, Order: order,
		Alive: func() []int { return shell.AliveRobots(ml, c.Fleet) }, AutoParallel: *autoParallel,
		Log: lg, Metrics: hub.NewMetrics(reg),
		OnRound: func(r hub.Record) {
			lg.Debug("round closed", zap.Uint64("round", r.Round), zap.Ints("order", r.Order), zap.Ints("held", r.Held),
				zap.Uint64("latency_us", r.LatencyUs))
		},
	}
	if logW != nil {
		cfg.DecisionLog = logW
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	ln, err := net.Listen("tcp", *httpAddr)
	if err != nil {
		return fail(fmt.Errorf("--http %s: %w", *httpAddr, err))
	}
	mux := http.NewServeMux()
	mux.Handle("GET /metrics", promhttp.HandlerFor(reg, promhttp.HandlerOpts{}))
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
	lg.Info("coordinator up", zap.String("fleet", c.Fleet), zap.String("scenario", m.Name()), zap.Int("robots", m.Robots()),
		zap.String("nats", nc.ConnectedUrl()), zap.String("gossip", *gossip), zap.String("mode", mode.String()), zap.String("guess", *guess), zap.String("digest", digest))
	hb := hub.New(cfg, nc)
	if *guessModel != "" {
		pub := &modelPublisher{file: *guessModel, m: m, nc: nc, bucket: shell.ModelBucket(c.Prefix, c.Fleet), hub: hb, lg: lg}
		if err := pub.check(ctx); err != nil {
			return fail(fmt.Errorf("--guess-model: %w", err))
		}
		go pub.watch(ctx)
	} else if *guess == "learned" {
		lg.Warn("--guess learned without --guess-model: robots guess with whatever model they were started with, or the base policy")
	}
	if err := hb.Run(ctx); err != nil && !errors.Is(err, context.Canceled) {
		return fail(err)
	}
	lg.Info("coordinator stopped")
	return 0
}

func parseOrder(s string, m int) ([]int, error) {
	if s == "" {
		return nil, nil
	}
	seen := map[int]bool{}
	var out []int
	for _, f := range strings.Split(s, ",") {
		v, err := strconv.Atoi(strings.TrimSpace(f))
		if err != nil || v < 0 || v >= m || seen[v] {
			return nil, fmt.Errorf("--order %q: want distinct robot ids 0..%d", s, m-1)
		}
		seen[v] = true
		out = append(out, v)
	}
	return out, nil
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
