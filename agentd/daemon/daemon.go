// Package daemon is agentd's command line: flags, NATS, gossip, the local
// HTTP interface, signals. agentd's main calls Main; so does `sim agentd`,
// which is how the simulator starts real daemons as separate processes
// without a separate build step.
package daemon

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"net"
	"net/http"
	"os"
	"os/signal"
	"strings"
	"syscall"
	"time"

	"github.com/hashicorp/memberlist"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"go.uber.org/zap"

	"baton/agentd/node"
	"baton/deploy/shell"
	"baton/signal/learn"
)

const synopsis = `agentd: one robot's Baton daemon.

It joins the fleet's gossip, takes its turn in every round (waiting for its
predecessors' decisions up to the turn deadline, guessing the rest), and
serves the robot's own software on a local HTTP interface:

  GET  /v1/decision?round=N&wait=2s[&closed=1]   this robot's decision; hold:true when it has none
  POST /v1/observation   {"round":N,"position":P,"applied":C,"seen":[{"what":i,"value":v}]}
  GET  /healthz          200 while it can act on rounds; 503 and why while it holds
  GET  /metrics          Prometheus

usage: agentd --robot N --nats URL [flags]
`

// Main runs agentd with args and returns the exit code.
func Main(args []string) int { return MainWith(args, shell.Hooks{}) }

// MainWith is Main with hooks (see shell.Hooks); only `sim` passes any.
func MainWith(args []string, hooks shell.Hooks) int {
	fs := flag.NewFlagSet("agentd", flag.ContinueOnError)
	var c shell.Common
	c.Register(fs, "must match the coordinator's")
	cfg := node.DefaultConfig()
	cfg.RegisterFlags(fs)
	robot := fs.Int("robot", -1, "this robot's id, 0..robots-1 (required)")
	httpAddr := fs.String("http", "127.0.0.1:7400", "local interface for the robot's software (localhost only by default)")
	tokenFile := fs.String("http-token-file", "", "file with a token (16+ characters) the local interface requires as 'Authorization: Bearer <token>'; needed when --http is not a loopback address")
	gossip := fs.String("gossip", "127.0.0.1:0", "gossip bind host:port (port 0 picks one)")
	join := fs.String("join", "", "gossip address(es) of the coordinator or any member, comma-separated")
	guessModel := fs.String("guess-model", "", "trained guess model file (signal/learn) for learned guesses; without one they are base guesses until the fleet distributes one")
	robotName := fs.String("robot-name", "", "this robot's name (the fleet file's), shown in the logs")
	if hooks.Flags != nil {
		hooks.Flags(fs)
	}
	args, err := shell.ExpandFleetFile(args, shell.RoleAgentd)
	if err != nil {
		fmt.Fprintln(os.Stderr, "agentd:", err)
		return 2
	}
	if code, ok := shell.Parse(fs, synopsis, args); !ok {
		return code
	}
	if hooks.Parsed != nil {
		if err := hooks.Parsed(); err != nil {
			fmt.Fprintln(os.Stderr, "agentd:", err)
			return 2
		}
	}
	if *robot < 0 {
		fmt.Fprintln(os.Stderr, "agentd: --robot N is required (this robot's id, 0..robots-1)")
		return 2
	}
	var token string
	if *tokenFile != "" {
		var err error
		if token, err = node.ReadToken(*tokenFile); err != nil {
			fmt.Fprintln(os.Stderr, "agentd:", err)
			return 2
		}
	} else if !node.Loopback(*httpAddr) {
		fmt.Fprintf(os.Stderr, "agentd: --http %s is reachable from other hosts: give --http-token-file (requests then need 'Authorization: Bearer <token>'), or bind 127.0.0.1\n", *httpAddr)
		return 2
	}
	lg, fail, err := c.Start(fmt.Sprintf("agentd-%d", *robot))
	if err != nil {
		fmt.Fprintln(os.Stderr, "agentd:", err)
		return 2
	}
	defer lg.Sync()
	fl, err := c.Load()
	if err != nil {
		return fail(err)
	}
	m := fl.Model
	cfg.Fleet, cfg.Subjects, cfg.Robot, cfg.Model, cfg.Digest = c.Fleet, fl.Subjects, *robot, m, fl.Digest
	cfg.Sender = fmt.Sprintf("robot-%d@%d", *robot, os.Getpid())
	if *guessModel != "" {
		net, meta, err := learn.Load(*guessModel, m)
		if err != nil {
			return fail(fmt.Errorf("--guess-model: %w", err))
		}
		cfg.Guesses.Classifier = net
		lg.Info("guess model loaded", zap.String("file", *guessModel), zap.Uint64("version", meta.Version),
			zap.Int("trained_robots", meta.RobotsTrained), zap.Float64("test_accuracy", meta.TestAccuracy))
	}
	if err := cfg.Validate(); err != nil {
		return fail(err)
	}
	ln, err := net.Listen("tcp", *httpAddr)
	if err != nil {
		return fail(fmt.Errorf("--http %s: %w", *httpAddr, err))
	}
	reg := prometheus.NewRegistry()
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	cfg.Log, cfg.Metrics = lg, node.NewMetrics(reg)
	tlsOpts, err := c.TLSOptions()
	if err != nil {
		return fail(err)
	}
	nc, err := shell.Connect(c.NATS, c.Creds, cfg.Sender, c.ConnectTimeout, lg,
		append(tlsOpts, shell.ClientErrors(lg, func(kind string) { cfg.Metrics.NATSErrors.WithLabelValues(kind).Inc() }))...)
	if err != nil {
		return fail(err)
	}
	defer nc.Close()
	var joinList []string
	if *join != "" {
		joinList = strings.Split(*join, ",")
	} else {
		lg.Warn("no --join: this robot is in no fleet's gossip, so no coordinator will schedule it")
	}
	self := shell.Incarnation(shell.RobotMember(c.Fleet, *robot))
	gopts, err := c.GossipOptions()
	if err != nil {
		return fail(err)
	}
	gopts = append(gopts, func(mc *memberlist.Config) { mc.Events = shell.ClaimWatch{Self: self, Log: lg} })
	ml, err := shell.Gossip(self, *gossip, joinList, lg, gopts...)
	if err != nil {
		return fail(err)
	}
	defer func() {
		_ = ml.Leave(time.Second)
		_ = ml.Shutdown()
	}()
	// One daemon per robot: a second one would publish a second decision
	// for it every round (and peers would drop both as conflicting).
	if other := shell.LiveClaim(ml, 3); other != nil {
		return fail(shell.ClaimError(shell.RobotMember(c.Fleet, *robot), other))
	}
	bucket := shell.ModelBucket(c.Prefix, c.Fleet)
	cfg.FetchModel = func(ctx context.Context, v uint64) ([]byte, error) { return shell.FetchModel(ctx, nc, bucket, v) }
	var bus shell.Bus = shell.NATSBus{Conn: nc}
	if hooks.Bus != nil {
		wrapped, closeBus, err := hooks.Bus(bus, *robot, cfg.Subjects)
		if err != nil {
			return fail(err)
		}
		defer closeBus()
		bus = wrapped
	}
	n := node.New(cfg, bus)
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	go shell.KeepJoined(ctx, ml, joinList, c.Fleet+"/coordinator", lg)
	handler := n.Handler(reg)
	if token != "" {
		handler = node.RequireToken(handler, token)
	}
	srv := &http.Server{Handler: handler, ReadHeaderTimeout: 5 * time.Second}
	go func() {
		if err := srv.Serve(ln); err != nil && !errors.Is(err, http.ErrServerClosed) {
			lg.Error("local interface stopped", zap.Error(err))
			stop()
		}
	}()
	lg.Info("agentd up", zap.Int("robot", *robot), zap.String("name", *robotName), zap.String("fleet", c.Fleet), zap.String("scenario", m.Name()),
		zap.String("http", ln.Addr().String()), zap.String("nats", nc.ConnectedUrl()), zap.String("digest", fl.Digest))
	err = n.Run(ctx)
	sctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
	defer cancel()
	_ = srv.Shutdown(sctx)
	if err != nil {
		return fail(err)
	}
	lg.Info("agentd stopped")
	return 0
}
