package cli

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"math/rand/v2"
	"net"
	"net/http"
	"os"
	"os/exec"
	"os/signal"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"

	"baton/agentd/node"
	"baton/coordinator/clock"
	"baton/deploy/shell"
	pb "baton/proto"
	"baton/signal/learn"
	"baton/sim/episode"
	"baton/sim/fault"
	"baton/sim/fault/tcpfault"
	"baton/sim/fleetsum"
	"baton/sim/model"
	"baton/sim/vfleet"
	"baton/sim/world"
)

// faults maps robot -> injected decision delay, from repeated --slow flags.
type faults map[int]time.Duration

func (f faults) String() string { return fmt.Sprint(map[int]time.Duration(f)) }

func (f faults) Set(s string) error {
	r, d, ok := strings.Cut(s, "=")
	id, err := strconv.Atoi(r)
	if !ok || err != nil || id < 0 {
		return fmt.Errorf("want ROBOT=DELAY, e.g. 2=500ms, got %q", s)
	}
	dur, err := time.ParseDuration(d)
	if err != nil || dur < 0 {
		return fmt.Errorf("bad delay in %q", s)
	}
	f[id] = dur
	return nil
}

// fleetOpts configures a fleet on this machine. The round flags are the
// coordinator's own (clock.Config), passed through unchanged.
type fleetOpts struct {
	sc         scenarioFlags
	clock      clock.Config // Rounds: the rounds to play
	seed       uint64       // run seed: world and fleet seeds derive from it
	fleet      string
	prefix     string
	logDir     string
	slow       faults
	guessModel string // model file the coordinator distributes
	exe        string // the binary that runs `agentd` and `coordinator`
	// Drills: the episode seed (0: episode 0 of seed), the fault layer's
	// plan for every daemon, and a TCP fault proxy between the robots and
	// the NATS server.
	world uint64
	plan  *drillPlan
	proxy bool
	// The virtual-time fleet instead of processes, with its link model.
	virtual     bool
	link        vfleet.Link
	turnTime    time.Duration
	virtualOnly []string // virtual-only flags given on the command line
	// secure: per-process NATS identities and TLS, as on a site.
	secure bool
	// trueWear: the world keeps a belief scenario's hidden truth.
	trueWear bool
}

// fleetRun is a running fleet: processes, the embedded NATS server and the
// world, which it plays through each robot's local interface.
type fleetRun struct {
	o   fleetOpts
	m   model.Fleet
	ns  *shell.Embedded
	url string
	// robotURL is where robots connect: the server, or the fault proxy.
	robotURL string
	tcp      *tcpfault.Proxy
	planFile string
	coord    *proc
	robots   []*proc
	bases    []string
	common   []string
	gossip   string
	chttp    string
	world    *world.World
	u        []int // what each robot carried out last round
	client   *http.Client
	wait     time.Duration

	coordArgs []string
	oldRuns   []string // the run each robot followed before a coordinator restart
	store     string   // the embedded server's JetStream files, kept across its restarts
	sec       *secureFleet
	// beforeReport, when set, runs once in the next round between reading
	// the decisions and reporting (a drill's mid-round fault); hookErr is
	// what it returned.
	beforeReport func() error
	hookErr      error
	nc           *nats.Conn // the simulator's own connection (soak samples), made when first needed
}

func startFleet(ctx context.Context, o fleetOpts) (*fleetRun, error) {
	fm, err := o.model()
	if err != nil {
		return nil, err
	}
	var m model.Model = fm
	if err := os.MkdirAll(o.logDir, 0o755); err != nil {
		return nil, fmt.Errorf("--logs: %w", err)
	}
	f := &fleetRun{o: o, m: fm, client: &http.Client{}, u: make([]int, m.Robots()), robots: make([]*proc, m.Robots())}
	m = fm
	// The server's JetStream files (guess models, the durable decision
	// log) outlive a NATS restart, as on a real server's disk.
	if f.store, err = os.MkdirTemp("", "baton-fleet-nats-"); err != nil {
		return nil, err
	}
	if o.secure {
		if f.sec, err = makeSecure(filepath.Join(o.logDir, "secure"), o.prefix, o.fleet, m.Robots()); err != nil {
			os.RemoveAll(f.store)
			return nil, err
		}
	}
	f.ns, f.url, err = shell.EmbeddedNATSWith("127.0.0.1", 0, f.store, f.setSecure)
	if err != nil {
		os.RemoveAll(f.store)
		return nil, err
	}
	f.robotURL = f.url
	if o.proxy {
		if f.tcp, err = tcpfault.Listen("127.0.0.1:0", strings.TrimPrefix(f.url, "nats://")); err != nil {
			f.close()
			return nil, err
		}
		f.robotURL = "nats://" + f.tcp.Addr()
	}
	if plan := o.faultPlan(m.Robots()); plan != nil {
		f.planFile = filepath.Join(o.logDir, "drill-faults.json")
		if err := writePlan(f.planFile, *plan); err != nil {
			f.close()
			return nil, err
		}
	}
	ports, err := freePorts(m.Robots() + 2)
	if err != nil {
		f.close()
		return nil, err
	}
	f.gossip = fmt.Sprintf("127.0.0.1:%d", ports[0])
	f.chttp = fmt.Sprintf("127.0.0.1:%d", ports[1])
	epSeed := episode.Seed(o.seed, 0)
	if o.world != 0 {
		epSeed = o.world
	}
	f.common = []string{"--fleet", o.fleet, "--prefix", o.prefix, "--scenario", o.sc.name, "--robots", strconv.Itoa(m.Robots())}
	if o.sc.file != "" {
		abs, _ := filepath.Abs(o.sc.file)
		f.common = append(f.common, "--config", abs)
	}
	if o.sc.starts != "" {
		f.common = append(f.common, "--starts", o.sc.starts)
	}
	if f.planFile != "" {
		f.common = append(f.common, "--drill-faults", f.planFile)
	}
	coordArgs := append([]string{"coordinator", "--nats", f.url}, f.common...)
	coordArgs = append(coordArgs, f.identity("coordinator")...)
	cc := o.clock
	cc.Seed = episode.FleetSeed(epSeed)
	coordArgs = append(coordArgs, cc.Args()...)
	coordArgs = append(coordArgs, "--decision-log", f.decisionLog(), "--http", f.chttp, "--gossip", f.gossip)
	if o.guessModel != "" {
		abs, _ := filepath.Abs(o.guessModel)
		coordArgs = append(coordArgs, "--guess-model", abs)
	}
	f.coordArgs = coordArgs
	if f.coord, err = f.spawn("coordinator", coordArgs); err != nil {
		f.close()
		return nil, err
	}
	for r := range m.Robots() {
		f.bases = append(f.bases, fmt.Sprintf("http://127.0.0.1:%d", ports[2+r]))
		if err := f.startRobot(r); err != nil {
			f.close()
			return nil, err
		}
	}
	for r := range m.Robots() {
		if err := f.waitRobot(ctx, r); err != nil {
			f.close()
			return nil, err
		}
	}
	if err := f.waitAlive(ctx, m.Robots(), 30*time.Second); err != nil {
		f.close()
		return nil, fmt.Errorf("coordinator did not see every robot join (see %s): %w", filepath.Join(o.logDir, "coordinator.log"), err)
	}
	if o.trueWear {
		if f.world, err = world.NewTrue(fm, epSeed); err != nil {
			f.close()
			return nil, fmt.Errorf("--true-wear: %w", err)
		}
	} else {
		f.world = world.New(fm, epSeed)
	}
	f.wait = time.Duration(m.Robots()+2)*o.clock.TurnBudget + 10*time.Second
	f.report(0)
	return f, nil
}

func (f *fleetRun) decisionLog() string { return filepath.Join(f.o.logDir, "decisions.jsonl") }

// setSecure gives the embedded server the fleet's authorization and TLS
// (--secure; nothing otherwise).
func (f *fleetRun) setSecure(o *server.Options) {
	if f.sec != nil {
		f.sec.set(o)
	}
}

// identity is a daemon's credential flags (--secure; none otherwise).
func (f *fleetRun) identity(name string) []string {
	if f.sec == nil {
		return nil
	}
	return f.sec.args(name)
}

// connect is the simulator's own connection to the fleet's server.
func (f *fleetRun) connect() (*nats.Conn, error) {
	if f.sec != nil {
		return f.sec.connect(f.url)
	}
	return nats.Connect(f.url)
}

// durableLog is where the durable log's export goes.
func (f *fleetRun) durableLog() string { return filepath.Join(f.o.logDir, "decisions-stream.jsonl") }

// replay reads the coordinator's durable log from the embedded server,
// writes it to durableLog, and puts the episode back together.
func (f *fleetRun) replay() (replayResult, error) {
	nc, err := f.connect()
	if err != nil {
		return replayResult{}, err
	}
	defer nc.Close()
	out, err := os.Create(f.durableLog())
	if err != nil {
		return replayResult{}, err
	}
	defer out.Close()
	bw := bufio.NewWriter(out)
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	lines, err := readLogStream(ctx, nc, f.o.prefix, f.o.fleet, bw)
	if ferr := bw.Flush(); err == nil {
		err = ferr
	}
	if err != nil {
		return replayResult{}, err
	}
	digest, err := f.o.sc.digest(f.m.Robots())
	if err != nil {
		return replayResult{}, err
	}
	res, err := assemble(lines, f.m, digest)
	res.Source = f.durableLog()
	return res, err
}

// proc is a child process; done closes when it has exited.
type proc struct {
	cmd  *exec.Cmd
	done chan struct{}
}

func (p *proc) exited() bool {
	select {
	case <-p.done:
		return true
	default:
		return false
	}
}

func (f *fleetRun) spawn(name string, args []string) (*proc, error) {
	logf, err := os.OpenFile(filepath.Join(f.o.logDir, name+".log"), os.O_CREATE|os.O_WRONLY|os.O_APPEND, 0o644)
	if err != nil {
		return nil, err
	}
	cmd := exec.Command(f.o.exe, args...)
	cmd.Stdout, cmd.Stderr = logf, logf
	if f.planFile != "" {
		cmd.Env = append(os.Environ(), DrillEnv+"=1")
	}
	// Children die with the simulator, even when it is killed outright.
	cmd.SysProcAttr = &syscall.SysProcAttr{Pdeathsig: syscall.SIGTERM}
	if err := cmd.Start(); err != nil {
		logf.Close()
		return nil, fmt.Errorf("starting %s: %w", name, err)
	}
	p := &proc{cmd: cmd, done: make(chan struct{})}
	go func() { _ = cmd.Wait(); logf.Close(); close(p.done) }()
	return p, nil
}

func (f *fleetRun) startRobot(r int) error {
	port := strings.TrimPrefix(f.bases[r], "http://")
	args := append([]string{"agentd", "--nats", f.robotURL}, f.common...)
	args = append(args, "--robot", strconv.Itoa(r), "--http", port, "--join", f.gossip)
	args = append(args, f.identity(fmt.Sprintf("robot-%d", r))...)
	p, err := f.spawn(fmt.Sprintf("agentd-%d", r), args)
	f.robots[r] = p
	return err
}

// waitRobot waits for robot r's daemon to serve. A port picked free can be
// taken by another process before the daemon binds it; then the daemon
// starts again on another port (a few times at most).
func (f *fleetRun) waitRobot(ctx context.Context, r int) error {
	logPath := filepath.Join(f.o.logDir, fmt.Sprintf("agentd-%d.log", r))
	for attempt := 0; ; attempt++ {
		err := waitHealthy(ctx, f.client, f.bases[r]+"/healthz", 30*time.Second, f.robots[r])
		if err == nil {
			return nil
		}
		if attempt == 3 || !f.robots[r].exited() || !lostPort(logPath) {
			return fmt.Errorf("agentd %d did not come up (see %s): %w", r, logPath, err)
		}
		ports, perr := freePorts(1)
		if perr != nil {
			return perr
		}
		f.bases[r] = fmt.Sprintf("http://127.0.0.1:%d", ports[0])
		if err := f.startRobot(r); err != nil {
			return err
		}
	}
}

// lostPort reports whether a child's log ends with a failure to bind.
func lostPort(logPath string) bool {
	b, err := os.ReadFile(logPath)
	if err != nil {
		return false
	}
	if len(b) > 4096 {
		b = b[len(b)-4096:]
	}
	return bytes.Contains(b, []byte("address already in use"))
}

// kill stops robot r's daemon abruptly (SIGKILL: no goodbye to gossip).
func (f *fleetRun) kill(r int) {
	if p := f.robots[r]; p != nil {
		_ = p.cmd.Process.Kill()
		<-p.done
	}
}

// restart starts robot r's daemon again and waits for it to serve.
func (f *fleetRun) restart(ctx context.Context, r int) error {
	if err := f.startRobot(r); err != nil {
		return err
	}
	return f.waitRobot(ctx, r)
}

// restartCoordinator kills the coordinator and starts it again with the
// same flags; robots must find it again through gossip.
func (f *fleetRun) restartCoordinator(ctx context.Context, down time.Duration) error {
	f.oldRuns = make([]string, len(f.bases))
	for r := range f.bases {
		f.oldRuns[r] = f.runOf(r)
	}
	_ = f.coord.cmd.Process.Kill()
	<-f.coord.done
	time.Sleep(down)
	var err error
	if f.coord, err = f.spawn("coordinator", f.coordArgs); err != nil {
		return err
	}
	return f.waitAlive(ctx, f.m.Robots(), 30*time.Second)
}

// runOf is the coordinator run robot r follows, as its /healthz says
// ("run <epoch> round <n>"; "" when it says otherwise).
func (f *fleetRun) runOf(r int) string {
	resp, err := f.client.Get(f.bases[r] + "/healthz")
	if err != nil {
		return ""
	}
	body, _ := io.ReadAll(io.LimitReader(resp.Body, 1024))
	resp.Body.Close()
	_, rest, ok := strings.Cut(string(body), " run ")
	if !ok {
		return ""
	}
	run, _, _ := strings.Cut(rest, " ")
	return run
}

// waitNewRun waits until every robot follows the restarted coordinator's
// run. (The run continues the round numbering from the durable log.)
func (f *fleetRun) waitNewRun(limit time.Duration) error {
	for r := range f.bases {
		deadline := time.Now().Add(limit)
		for {
			if run := f.runOf(r); run != "" && run != f.oldRuns[r] {
				break
			}
			if time.Now().After(deadline) {
				return fmt.Errorf("robot %d never followed the restarted coordinator's run", r)
			}
			time.Sleep(20 * time.Millisecond)
		}
	}
	return nil
}

// report posts every robot's observation of the last round.
func (f *fleetRun) report(round int) {
	for r, b := range f.bases {
		pos, seen := f.world.Report(r)
		body, _ := json.Marshal(node.Report{Round: uint64(round), Position: pos, Applied: f.u[r], Seen: seen})
		resp, err := f.client.Post(b+"/v1/observation", "application/json", bytes.NewReader(body))
		if err != nil {
			continue // a dead daemon cannot report; the coordinator keeps its last position
		}
		io.Copy(io.Discard, resp.Body)
		resp.Body.Close()
	}
}

// play runs one round: read every robot's decision once its round closed
// (hold without one), step the world, report.
func (f *fleetRun) play(round int) fleetsum.Round {
	res := fleetsum.Round{Round: round, Decided: make([]int, len(f.bases))}
	t0 := time.Now()
	views, errs := f.readDecisions(round)
	for r := range f.bases {
		v, err := views[r], errs[r]
		if err == nil {
			// The round's latency, whoever held: a round everyone held
			// for still took its time.
			res.LatencyUs = max(res.LatencyUs, v.RoundLatencyUs)
		}
		if err != nil || v.Hold {
			res.Held++
			res.Decided[r] = -1
			continue
		}
		res.Decided[r] = v.Control
		if len(v.Guessed) > 0 {
			res.Guessed++
		}
	}
	if res.LatencyUs == 0 {
		// No robot saw the close: the round lasted as long as the
		// software waited for it.
		res.LatencyUs = uint64(time.Since(t0) / time.Microsecond)
	}
	f.u = res.Controls()
	res.Cost = f.world.Apply(f.u)
	if hook := f.beforeReport; hook != nil {
		f.beforeReport = nil
		f.hookErr = hook()
	}
	f.report(round)
	return res
}

// readDecisions is every robot's software reading its decision for round.
// Each waits on its own: one that waits long (its daemon just restarted,
// say) must not make the others read their decisions after their round is
// over.
func (f *fleetRun) readDecisions(round int) ([]node.View, []error) {
	views := make([]node.View, len(f.bases))
	errs := make([]error, len(f.bases))
	var wg sync.WaitGroup
	for r, b := range f.bases {
		wg.Add(1)
		go func() {
			defer wg.Done()
			views[r], errs[r] = getDecision(f.client, b, round, f.wait)
		}()
	}
	wg.Wait()
	return views, errs
}

func (f *fleetRun) close() {
	if f.nc != nil {
		f.nc.Close()
	}
	procs := append([]*proc{f.coord}, f.robots...)
	stopAll(procs)
	if f.tcp != nil {
		f.tcp.Close()
	}
	if f.ns != nil {
		f.ns.Shutdown()
	}
	if f.store != "" {
		os.RemoveAll(f.store)
	}
}

// faultPlan is the fault layer's plan for the daemons: the drill's, plus
// --slow robots as delays on every link out of them.
func (o fleetOpts) faultPlan(robots int) *drillPlan {
	var p drillPlan
	if o.plan != nil {
		p = *o.plan
	}
	for r, d := range o.slow {
		s := fault.Spec{Kind: fault.Delay, Delay: fault.Jitter{Fixed: d}}
		for to := fault.Coordinator; to < robots; to++ {
			if to != r {
				s.Links = append(s.Links, [2]int{r, to})
			}
		}
		p.Specs = append(p.Specs, s)
	}
	if len(p.Specs) == 0 {
		return nil
	}
	return &p
}

// restartNATS stops the embedded server (every client loses it), waits
// down, and starts a new one on the same address; clients reconnect.
func (f *fleetRun) restartNATS(down time.Duration) error {
	f.ns.Shutdown()
	time.Sleep(down)
	host, portStr, err := net.SplitHostPort(strings.TrimPrefix(f.url, "nats://"))
	if err != nil {
		return err
	}
	port, _ := strconv.Atoi(portStr)
	var lastErr error
	for range 50 { // the old listener may linger a moment
		if f.ns, _, lastErr = shell.EmbeddedNATSWith(host, port, f.store, f.setSecure); lastErr == nil {
			return nil
		}
		time.Sleep(100 * time.Millisecond)
	}
	f.ns = nil
	return fmt.Errorf("restarting NATS on %s: %w", f.url, lastErr)
}

// model loads the scenario and checks the options against it.
func (o fleetOpts) model() (model.Fleet, error) {
	m, err := o.sc.load()
	if err != nil {
		return nil, err
	}
	return o.check(m)
}

// check validates the options against the scenario.
func (o fleetOpts) check(m model.Model) (model.Fleet, error) {
	fm, ok := m.(model.Fleet)
	if !ok {
		return nil, fmt.Errorf("scenario %s cannot run as a fleet", m.Name())
	}
	if o.clock.Rounds < 1 {
		return nil, fmt.Errorf("--rounds %d: want at least 1 round to play", o.clock.Rounds)
	}
	c := o.clock
	c.Model = fm
	if err := c.Validate(); err != nil {
		return nil, err
	}
	if o.guessModel != "" {
		if _, _, err := learn.Load(o.guessModel, m); err != nil {
			return nil, fmt.Errorf("--guess-model: %w", err)
		}
	}
	for r := range o.slow {
		if r >= m.Robots() {
			return nil, fmt.Errorf("--slow %d=...: the fleet has robots 0..%d", r, m.Robots()-1)
		}
	}
	if o.virtual && o.trueWear {
		return nil, errors.New("--true-wear is for fleets of processes; the virtual fleet's world is sim compare's")
	}
	if o.virtual && o.secure {
		return nil, errors.New("--secure is for fleets of processes over NATS; the virtual fleet has no server")
	}
	if !o.virtual && len(o.virtualOnly) > 0 {
		return nil, fmt.Errorf("--%s models the virtual fleet's links or compute: add --virtual", o.virtualOnly[0])
	}
	if _, err := pb.NewSubjects(o.prefix, o.fleet); err != nil {
		return nil, err
	}
	if !(o.link.Loss >= 0 && o.link.Loss <= 1) {
		return nil, fmt.Errorf("--loss %g: want a probability in [0, 1]", o.link.Loss)
	}
	if o.link.Hop < 0 || o.link.Jitter < 0 || o.turnTime < 0 {
		return nil, errors.New("--hop, --jitter and --turn-time: want durations >= 0")
	}
	return fm, nil
}

// The virtual fleet's defaults: a loopback-like hop and a small turn.
const (
	defaultHop      = 100 * time.Microsecond
	defaultTurnTime = 2 * time.Millisecond
)

func cmdFleet(args []string) error {
	fs := newFlags("fleet", `Runs a whole fleet on this machine: an embedded NATS server, the coordinator and
one agentd per robot as separate processes; the simulator plays the world through
each robot's local interface and prints per-round progress and a summary.

With --virtual the same fleet runs in one process in virtual time: the robots' and
the coordinator's protocol machines exchange their real wire messages over an
in-memory bus (--hop, --jitter, --loss), robots compute real rollout turns (each
taking --turn-time of virtual time), nothing sleeps. With no loss it decides
exactly what the real fleet decides for the same flags: compare decisions_sha256.`)
	o := fleetOpts{slow: faults{}, clock: clock.DefaultConfig(), turnTime: defaultTurnTime}
	o.clock.Rounds = 200
	o.link.Hop = defaultHop
	o.sc.register(fs)
	o.clock.RegisterFlags(fs)
	fs.Uint64Var(&o.seed, "seed", 1, "run seed (world and fleet seeds derive from it, as in sim compare's episode 0)")
	fs.StringVar(&o.fleet, "fleet", "demo", "fleet id")
	fs.StringVar(&o.prefix, "prefix", "baton", "NATS subject prefix")
	fs.StringVar(&o.logDir, "logs", "", "directory for the processes' logs and the decision log (default: a new temp dir)")
	asJSON := fs.Bool("json", false, "print the summary as one JSON object (no per-round lines)")
	quiet := fs.Bool("quiet", false, "no per-round lines")
	fs.Var(o.slow, "slow", "fault injection: ROBOT=DELAY holds back that robot's decisions (repeatable)")
	fs.StringVar(&o.guessModel, "guess-model", "", "model file from sim train, distributed to the robots (for --guess learned)")
	fs.BoolVar(&o.virtual, "virtual", false, "run the fleet in one process in virtual time instead of as processes over NATS")
	fs.BoolVar(&o.trueWear, "true-wear", false, "upkeep: the simulated world keeps each site's true wear level (drawn, worn and seen by robots) and reports the true cost beside the belief's expected cost; its draws differ from sim compare's episodes")
	fs.BoolVar(&o.secure, "secure", false, "as on a site: an nkey and publish permissions per process (as sim creds makes them) and TLS to the NATS server (a throwaway CA, in the logs directory)")
	fs.DurationVar(&o.link.Hop, "hop", o.link.Hop, "virtual: one-way delay of every delivery on the in-memory bus")
	fs.DurationVar(&o.link.Jitter, "jitter", 0, "virtual: plus a uniform random delay in [0, jitter)")
	fs.Float64Var(&o.link.Loss, "loss", 0, "virtual: probability that a delivery is lost")
	fs.DurationVar(&o.turnTime, "turn-time", o.turnTime, "virtual: virtual time one rollout turn takes")
	shell.RegisterFleetFile(fs)
	watch := fs.Bool("view", false, "print the live view's address (the coordinator's /view: the site, every robot and its move, guesses and holds) and start rounds at most every 300ms (unless --period says otherwise) so the fleet can be watched")
	args, xerr := shell.ExpandFleetFile(args, shell.RoleSim)
	if xerr != nil {
		return xerr
	}
	if err := parse(fs, args); err != nil {
		return err
	}
	o.link.Seed = o.seed
	periodSet := false
	fs.Visit(func(f *flag.Flag) {
		switch f.Name {
		case "hop", "jitter", "loss", "turn-time":
			o.virtualOnly = append(o.virtualOnly, f.Name)
		case "period":
			periodSet = true
		}
	})
	if (o.clock.Guess == "learned" || o.clock.Guess == "checked") && o.guessModel == "" {
		fmt.Fprintf(os.Stderr, "sim fleet: warning: --guess %s without --guess-model: the robots have no model and guess with the base policy (train one: sim train --out FILE)\n", o.clock.Guess)
	}
	if *watch && o.virtual {
		return errors.New("--view shows a fleet of processes (the coordinator serves it); for the virtual fleet, replay its log: sim replay --view")
	}
	if *watch && !periodSet {
		o.clock.Period = 300 * time.Millisecond
	}
	var err error
	if o.exe, err = os.Executable(); err != nil {
		return err
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	rounds := o.clock.Rounds
	sum := fleetsum.Summary{Mode: clock.ModeName(o.clock), Guess: o.clock.Guess, Virtual: o.virtual}
	tally := fleetsum.NewTally()
	line := func(r fleetsum.Round) {
		tally.Add(&sum, r)
		if !*asJSON && !*quiet {
			fmt.Printf("round %4d/%d  stage cost %7.2f  latency %7.2f ms  guessed %2d  held %2d\n",
				r.Round, rounds, r.Cost, float64(r.LatencyUs)/1000, r.Guessed, r.Held)
		}
	}
	t0 := time.Now()
	var w *world.World
	if o.virtual {
		vf, err := startVirtual(o)
		if err != nil {
			return err
		}
		m := vf.World().M
		sum.Scenario, sum.Robots = m.Name(), m.Robots()
		if !*asJSON {
			fmt.Printf("fleet %s: %s, %d robots, %s mode, virtual time (hop %s, jitter %s, loss %g, turn %s)\n",
				o.fleet, m.Name(), m.Robots(), o.clock.Mode, o.link.Hop, o.link.Jitter, o.link.Loss, o.turnTime)
		}
		for sum.Rounds < rounds && ctx.Err() == nil {
			// Batches of 10, to notice Ctrl-C between them.
			if _, err := vf.Run(min(10, rounds-sum.Rounds), line); err != nil {
				return err
			}
		}
		w = vf.World()
		sum.WallSeconds = time.Since(t0).Seconds()
		sum.ComputeShare = vf.ComputeTime().Seconds() / sum.WallSeconds
	} else {
		if o.logDir == "" {
			if o.logDir, err = os.MkdirTemp("", "baton-fleet-"); err != nil {
				return err
			}
		}
		f, err := startFleet(ctx, o)
		if err != nil {
			return err
		}
		defer f.close()
		m := f.m
		sum.Scenario, sum.Robots, sum.DecisionLog, sum.ProcessLogDir = m.Name(), m.Robots(), f.decisionLog(), o.logDir
		if !*asJSON {
			fmt.Printf("fleet %s: %s, %d robots, %s mode, NATS %s, logs in %s\n", o.fleet, m.Name(), m.Robots(), o.clock.Mode, f.url, o.logDir)
		}
		if *watch {
			fmt.Fprintf(os.Stderr, "live view: http://%s/view  (open it in a browser; a round at most every %s)\n", f.chttp, o.clock.Period)
		} else if !*asJSON {
			fmt.Printf("live view: http://%s/view  (--view paces the rounds for watching)\n", f.chttp)
		}
		t0 = time.Now()
		for round := 1; round <= rounds && ctx.Err() == nil; round++ {
			line(f.play(round))
		}
		sum.WallSeconds = time.Since(t0).Seconds()
		for _, p := range f.robots {
			if p != nil && !p.exited() {
				sum.AgentdMaxRSS = max(sum.AgentdMaxRSS, rssKB(p.cmd.Process.Pid))
			}
		}
		w = f.world
		if res, err := f.replay(); err != nil {
			fmt.Fprintf(os.Stderr, "sim fleet: reading the durable decision log: %v\n", err)
		} else {
			sum.DurableLog = res.Source
		}
		f.close()
	}
	sum.Batches = w.Batch
	sum.CostKind = fleetsum.CostKind(w.M)
	if o.trueWear {
		tc := w.TrueCost
		sum.TrueCost = &tc
		sum.CostKind = "undiscounted sum of stage costs, each the expectation over the fleet's belief of wear (what it decides on); true_cost is the world's hidden wear's"
	}
	tally.Finish(&sum)
	interrupted := ctx.Err() != nil
	if *asJSON {
		enc := json.NewEncoder(os.Stdout)
		enc.SetIndent("", "  ")
		if err := enc.Encode(sum); err != nil || !interrupted {
			return err
		}
		return fmt.Errorf("%w after %d of %d rounds", errInterrupted, sum.Rounds, rounds)
	}
	fmt.Printf("\n%d rounds, total cost %.2f (%.3f per round), %d batches of slicks or tasks finished\n", sum.Rounds, sum.Cost, sum.CostPerRound, sum.Batches)
	fmt.Printf("cost: %s\n", sum.CostKind)
	if sum.TrueCost != nil {
		fmt.Printf("true cost %.2f (the world's hidden wear, undiscounted; the expected cost above is its conditional mean)\n", *sum.TrueCost)
	}
	fmt.Printf("round latency p50 %.2f ms, p99 %.2f ms; turns decided with guesses %d; robot-rounds held %d\n",
		sum.LatencyP50Ms, sum.LatencyP99Ms, sum.TurnsGuessed, sum.RobotsHeld)
	fmt.Printf("%.1f rounds per second of wall time", sum.RoundsPerSecond)
	if o.virtual {
		fmt.Printf(" (%.0f%% of it rollout compute)", 100*sum.ComputeShare)
	}
	fmt.Println()
	if sum.AgentdMaxRSS > 0 {
		fmt.Printf("largest agentd resident memory %.1f MB\n", float64(sum.AgentdMaxRSS)/1024)
	}
	if sum.DecisionLog != "" {
		fmt.Printf("decision log %s\n", sum.DecisionLog)
	}
	if sum.DurableLog != "" {
		replayArgs := []string{"--file", sum.DurableLog, "--scenario", o.sc.name, "--robots", strconv.Itoa(sum.Robots)}
		if o.sc.file != "" {
			replayArgs = append(replayArgs, "--config", o.sc.file)
		}
		if o.sc.starts != "" {
			replayArgs = append(replayArgs, "--starts", strconv.Quote(o.sc.starts))
		}
		fmt.Printf("durable log (JetStream stream, exported) %s; replay: sim replay %s\n", sum.DurableLog, strings.Join(replayArgs, " "))
	}
	fmt.Printf("decisions sha256 %s\n", sum.DecisionsSHA256)
	if interrupted {
		return fmt.Errorf("%w after %d of %d rounds", errInterrupted, sum.Rounds, rounds)
	}
	return nil
}

// startVirtual builds the virtual-time fleet for the same options.
func startVirtual(o fleetOpts) (*vfleet.Fleet, error) {
	m, err := o.model()
	if err != nil {
		return nil, err
	}
	digest, err := o.sc.digest(m.Robots())
	if err != nil {
		return nil, err
	}
	ep := episode.Seed(o.seed, 0)
	c := o.clock
	c.Fleet, c.Model, c.Digest, c.Seed, c.Epoch = o.fleet, m, digest, episode.FleetSeed(ep), 1
	rc := node.DefaultConfig()
	cfg := vfleet.Config{Clock: c, Stale: rc.Stale, Guess: "base", GuessMargin: rc.GuessMargin, World: ep,
		Link: o.link, TurnTime: o.turnTime, Slow: o.slow}
	if o.guessModel != "" {
		net, _, err := learn.Load(o.guessModel, m)
		if err != nil {
			return nil, fmt.Errorf("--guess-model: %w", err)
		}
		cfg.Guesses.Classifier = net
	}
	return vfleet.New(cfg)
}

// rssKB reads a process's resident set size from /proc (0 if unknown).
func rssKB(pid int) int64 {
	data, err := os.ReadFile(fmt.Sprintf("/proc/%d/status", pid))
	if err != nil {
		return 0
	}
	for _, line := range strings.Split(string(data), "\n") {
		if rest, ok := strings.CutPrefix(line, "VmRSS:"); ok {
			v, _ := strconv.ParseInt(strings.Fields(rest)[0], 10, 64)
			return v
		}
	}
	return 0
}

func getDecision(c *http.Client, base string, round int, wait time.Duration) (node.View, error) {
	var v node.View
	resp, err := c.Get(fmt.Sprintf("%s/v1/decision?round=%d&closed=1&wait=%s", base, round, wait))
	if err != nil {
		return v, err
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		b, _ := io.ReadAll(resp.Body)
		return v, fmt.Errorf("%s: %s", resp.Status, b)
	}
	return v, json.NewDecoder(resp.Body).Decode(&v)
}

func waitHealthy(ctx context.Context, c *http.Client, url string, limit time.Duration, p *proc) error {
	deadline := time.Now().Add(limit)
	var last error
	for time.Now().Before(deadline) {
		if p != nil && p.exited() {
			return fmt.Errorf("the process exited: %s", p.cmd.ProcessState)
		}
		resp, err := c.Get(url)
		if err == nil {
			resp.Body.Close()
			if resp.StatusCode == http.StatusOK {
				return nil
			}
			err = errors.New(resp.Status)
		}
		last = err
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(50 * time.Millisecond):
		}
	}
	return fmt.Errorf("not healthy after %s: %v", limit, last)
}

// waitAlive polls the coordinator's healthz until it counts want robots.
func (f *fleetRun) waitAlive(ctx context.Context, want int, limit time.Duration) error {
	deadline := time.Now().Add(limit)
	for time.Now().Before(deadline) {
		if f.coord.exited() {
			return fmt.Errorf("the coordinator exited: %s", f.coord.cmd.ProcessState)
		}
		if resp, err := f.client.Get("http://" + f.chttp + "/healthz"); err == nil {
			b, _ := io.ReadAll(resp.Body)
			resp.Body.Close()
			if strings.Contains(string(b), fmt.Sprintf(", %d robots alive", want)) {
				return nil
			}
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(50 * time.Millisecond):
		}
	}
	return fmt.Errorf("fewer than %d robots after %s", want, limit)
}

// freePorts finds n loopback ports free for TCP and UDP (gossip uses
// both). It looks below the kernel's ephemeral range, where outgoing
// connections cannot take a port between this check and the child's bind.
func freePorts(n int) ([]int, error) {
	var closers []io.Closer
	defer func() {
		for _, c := range closers {
			c.Close()
		}
	}()
	var ports []int
	lo := ephemeralLow()
	for tries := 0; len(ports) < n; tries++ {
		if tries > 200*n {
			return nil, fmt.Errorf("no %d free loopback ports below %d", n, lo)
		}
		port := 10000 + rand.IntN(lo-10000)
		addr := fmt.Sprintf("127.0.0.1:%d", port)
		l, err := net.Listen("tcp", addr)
		if err != nil {
			continue
		}
		u, err := net.ListenPacket("udp", addr)
		if err != nil {
			l.Close()
			continue
		}
		closers = append(closers, l, u)
		ports = append(ports, port)
	}
	return ports, nil
}

// ephemeralLow is the lowest port the kernel hands to outgoing
// connections (32768 when it cannot tell).
func ephemeralLow() int {
	b, err := os.ReadFile("/proc/sys/net/ipv4/ip_local_port_range")
	if err == nil {
		if f := strings.Fields(string(b)); len(f) == 2 {
			if lo, err := strconv.Atoi(f[0]); err == nil && lo > 11000 && lo <= 65535 {
				return lo
			}
		}
	}
	return 32768
}

// stopAll asks every process to stop, then kills what is left after 5s.
func stopAll(procs []*proc) {
	for _, p := range procs {
		if p != nil && !p.exited() {
			_ = p.cmd.Process.Signal(syscall.SIGTERM)
		}
	}
	deadline := time.Now().Add(5 * time.Second)
	for _, p := range procs {
		if p == nil {
			continue
		}
		select {
		case <-p.done:
		case <-time.After(time.Until(deadline)):
			_ = p.cmd.Process.Kill()
			<-p.done
		}
	}
}
