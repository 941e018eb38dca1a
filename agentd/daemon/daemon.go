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

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"go.uber.org/zap"

	"baton/agentd/node"
	"baton/deploy/shell"
	bsignal "baton/signal"
	"baton/signal/learn"
)

const synopsis = `agentd: one robot's Baton daemon.

It joins the fleet's gossip, takes its turn in every round (waiting for its
predecessors' decisions up to the turn deadline, guessing the rest), and
serves the robot's own software on a local HTTP interface:

  GET  /v1/decision?round=N&wait=2s[&closed=1]   this robot's decision; hold:true when it has none
  POST /v1/observation   {"round":N,"position":P,"applied":C,"seen":[{"what":i,"value":v}]}
  GET  /healthz, GET /metrics

usage: agentd --robot N --nats URL [flags]
`

// Main runs agentd with args and returns the exit code.
func Main(args []string) int {
	fs := flag.NewFlagSet("agentd", flag.ContinueOnError)
	var c shell.Common
	c.Register(fs, "must match the coordinator's")
	robot := fs.Int("robot", -1, "this robot's id, 0..robots-1 (required)")
	httpAddr := fs.String("http", "127.0.0.1:7400", "local interface for the robot's software (localhost only by default)")
	gossip := fs.String("gossip", "127.0.0.1:0", "gossip bind host:port (port 0 picks one)")
	join := fs.String("join", "", "gossip address(es) of the coordinator or any member, comma-separated")
	guess := fs.String("guess", "base", "fallback guess source, used when a round start names none or one this robot cannot make: "+
		strings.Join(bsignal.Names(), ", ")+" (the coordinator's --guess picks the fleet's)")
	guessModel := fs.String("guess-model", "", "trained guess model file (signal/learn) for learned guesses; without one they are base guesses")
	delay := fs.Duration("inject-delay", 0, "fault injection: hold back this robot's decisions by this long")
	stale := fs.Duration("stale", 10*time.Second, "hold when no round has started for this long")
	if code, ok := shell.Parse(fs, synopsis, args); !ok {
		return code
	}
	if *robot < 0 {
		fmt.Fprintln(os.Stderr, "agentd: --robot N is required (this robot's id, 0..robots-1)")
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
	if *robot >= m.Robots() {
		return fail(fmt.Errorf("--robot %d: this fleet has robots 0..%d", *robot, m.Robots()-1))
	}
	subj, digest := fl.Subjects, fl.Digest
	// Without a guess model learned guesses are base guesses: the node
	// says so once when it first needs one.
	var guessOpts bsignal.Options
	if *guessModel != "" {
		net, meta, err := learn.Load(*guessModel, m)
		if err != nil {
			return fail(fmt.Errorf("--guess-model: %w", err))
		}
		guessOpts.Classifier = net
		lg.Info("guess model loaded", zap.String("file", *guessModel), zap.Uint64("version", meta.Version),
			zap.Int("trained_robots", meta.RobotsTrained), zap.Float64("test_accuracy", meta.TestAccuracy))
	}
	src, err := bsignal.New(*guess, m, guessOpts)
	if err != nil {
		return fail(fmt.Errorf("--guess: %w", err))
	}
	ln, err := net.Listen("tcp", *httpAddr)
	if err != nil {
		return fail(fmt.Errorf("--http %s: %w", *httpAddr, err))
	}
	sender := fmt.Sprintf("robot-%d@%d", *robot, os.Getpid())
	nc, err := shell.Connect(c.NATS, c.Creds, sender, c.ConnectTimeout, lg)
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
	ml, err := shell.Gossip(shell.RobotMember(c.Fleet, *robot), *gossip, joinList, lg)
	if err != nil {
		return fail(err)
	}
	defer func() {
		_ = ml.Leave(time.Second)
		_ = ml.Shutdown()
	}()

	reg := prometheus.NewRegistry()
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	bucket := shell.ModelBucket(c.Prefix, c.Fleet)
	n := node.New(node.Config{Fleet: c.Fleet, Subjects: subj, Robot: *robot, Sender: sender, Model: m, Digest: digest,
		Guess: src, Guesses: guessOpts, InjectDelay: *delay, Stale: *stale, Log: lg, Metrics: node.NewMetrics(reg),
		FetchModel: func(ctx context.Context, v uint64) ([]byte, error) { return shell.FetchModel(ctx, nc, bucket, v) }}, nc)
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	go shell.KeepJoined(ctx, ml, joinList, c.Fleet+"/coordinator", lg)
	srv := &http.Server{Handler: n.Handler(reg), ReadHeaderTimeout: 5 * time.Second}
	go func() {
		if err := srv.Serve(ln); err != nil && !errors.Is(err, http.ErrServerClosed) {
			lg.Error("local interface stopped", zap.Error(err))
			stop()
		}
	}()
	lg.Info("agentd up", zap.Int("robot", *robot), zap.String("fleet", c.Fleet), zap.String("scenario", m.Name()),
		zap.String("http", ln.Addr().String()), zap.String("nats", nc.ConnectedUrl()), zap.String("digest", digest))
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
