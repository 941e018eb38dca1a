package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"os"
	"os/exec"
	"os/signal"
	"path/filepath"
	"slices"
	"sort"
	"strconv"
	"strings"
	"syscall"
	"time"

	"baton/agentd/node"
	"baton/agentd/turn"
	"baton/deploy/shell"
	bsignal "baton/signal"
	"baton/signal/learn"
	"baton/sim/episode"
	"baton/sim/model"
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

// fleetOpts configures a fleet on this machine.
type fleetOpts struct {
	sc           scenarioFlags
	rounds       int
	seed         uint64
	mode         string
	turnDeadline time.Duration
	samples      int
	horizon      int
	period       time.Duration
	fleet        string
	prefix       string
	logDir       string
	slow         faults
	guess        string // the fleet's guess source
	guessModel   string // model file the coordinator distributes
	exe          string // the binary that runs `agentd` and `coordinator`
}

// fleetRun is a running fleet: processes, the embedded NATS server and the
// world, which it plays through each robot's local interface.
type fleetRun struct {
	o      fleetOpts
	m      model.Fleet
	ns     *shell.Embedded
	url    string
	coord  *proc
	robots []*proc
	bases  []string
	common []string
	gossip string
	chttp  string
	world  *world.World
	u      []int // what each robot carried out last round
	client *http.Client
	wait   time.Duration

	coordArgs []string
}

// roundResult is what the world saw of one round.
type roundResult struct {
	Round     int
	Cost      float64
	Controls  []int
	Guessed   int // robots that decided with a guess
	Held      int // robots without a decision (they hold)
	LatencyUs uint64
}

func startFleet(ctx context.Context, o fleetOpts) (*fleetRun, error) {
	m, err := o.sc.load()
	if err != nil {
		return nil, err
	}
	fm, ok := m.(model.Fleet)
	if !ok {
		return nil, fmt.Errorf("scenario %s cannot run as a fleet", m.Name())
	}
	if o.rounds < 1 {
		return nil, fmt.Errorf("--rounds must be at least 1, got %d", o.rounds)
	}
	if _, ok := turn.ParseMode(o.mode); !ok {
		return nil, fmt.Errorf("--mode %q: use sequential, parallel or hybrid", o.mode)
	}
	if o.turnDeadline <= 0 {
		return nil, fmt.Errorf("--turn-deadline must be positive, got %s", o.turnDeadline)
	}
	if o.guess != "" && !slices.Contains(bsignal.Names(), o.guess) {
		return nil, fmt.Errorf("--guess %q: use one of %s", o.guess, strings.Join(bsignal.Names(), ", "))
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
	if err := os.MkdirAll(o.logDir, 0o755); err != nil {
		return nil, fmt.Errorf("--logs: %w", err)
	}
	f := &fleetRun{o: o, m: fm, client: &http.Client{}, u: make([]int, m.Robots()), robots: make([]*proc, m.Robots())}
	f.ns, f.url, err = shell.EmbeddedNATS("127.0.0.1", 0)
	if err != nil {
		return nil, err
	}
	ports, err := freePorts(m.Robots() + 2)
	if err != nil {
		f.close()
		return nil, err
	}
	f.gossip = fmt.Sprintf("127.0.0.1:%d", ports[0])
	f.chttp = fmt.Sprintf("127.0.0.1:%d", ports[1])
	epSeed := episode.Seed(o.seed, 0)
	f.common = []string{"--nats", f.url, "--fleet", o.fleet, "--prefix", o.prefix, "--scenario", o.sc.name, "--robots", strconv.Itoa(m.Robots())}
	if o.sc.file != "" {
		abs, _ := filepath.Abs(o.sc.file)
		f.common = append(f.common, "--config", abs)
	}
	coordArgs := append([]string{"coordinator"}, f.common...)
	coordArgs = append(coordArgs, "--seed", strconv.FormatUint(episode.FleetSeed(epSeed), 10),
		"--samples", strconv.Itoa(o.samples), "--horizon", strconv.Itoa(o.horizon), "--mode", o.mode,
		"--turn-deadline", o.turnDeadline.String(), "--period", o.period.String(), "--rounds", strconv.Itoa(o.rounds),
		"--decision-log", f.decisionLog(), "--http", f.chttp, "--gossip", f.gossip)
	if o.guess != "" {
		coordArgs = append(coordArgs, "--guess", o.guess)
	}
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
	f.world = world.New(fm, epSeed)
	f.wait = time.Duration(m.Robots()+2)*o.turnDeadline + 10*time.Second
	f.report(0)
	return f, nil
}

func (f *fleetRun) decisionLog() string { return filepath.Join(f.o.logDir, "decisions.jsonl") }

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
	args := append([]string{"agentd"}, f.common...)
	args = append(args, "--robot", strconv.Itoa(r), "--http", port, "--join", f.gossip)
	if d := f.o.slow[r]; d > 0 {
		args = append(args, "--inject-delay", d.String())
	}
	p, err := f.spawn(fmt.Sprintf("agentd-%d", r), args)
	f.robots[r] = p
	return err
}

func (f *fleetRun) waitRobot(ctx context.Context, r int) error {
	if err := waitHealthy(ctx, f.client, f.bases[r]+"/healthz", 30*time.Second, f.robots[r]); err != nil {
		return fmt.Errorf("agentd %d did not come up (see %s): %w", r, filepath.Join(f.o.logDir, fmt.Sprintf("agentd-%d.log", r)), err)
	}
	return nil
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
	_ = f.coord.cmd.Process.Kill()
	<-f.coord.done
	time.Sleep(down)
	var err error
	if f.coord, err = f.spawn("coordinator", f.coordArgs); err != nil {
		return err
	}
	return f.waitAlive(ctx, f.m.Robots(), 30*time.Second)
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

// play runs one round: read every robot's decision (hold without one),
// step the world, report.
func (f *fleetRun) play(round int) roundResult {
	res := roundResult{Round: round}
	for r, b := range f.bases {
		v, err := getDecision(f.client, b, round, f.wait)
		if err != nil || v.Hold {
			res.Held++
			f.u[r] = 0 // no valid decision: the robot holds
			continue
		}
		f.u[r] = v.Control
		if len(v.Guessed) > 0 {
			res.Guessed++
		}
		res.LatencyUs = max(res.LatencyUs, v.RoundLatencyUs)
	}
	res.Controls = append([]int(nil), f.u...)
	res.Cost = f.world.Apply(f.u)
	f.report(round)
	return res
}

func (f *fleetRun) close() {
	procs := append([]*proc{f.coord}, f.robots...)
	stopAll(procs)
	if f.ns != nil {
		f.ns.Shutdown()
	}
}

type fleetSummary struct {
	Scenario      string  `json:"scenario"`
	Robots        int     `json:"robots"`
	Rounds        int     `json:"rounds"`
	Mode          string  `json:"mode"`
	Guess         string  `json:"guess"`
	Cost          float64 `json:"cost"`
	CostPerRound  float64 `json:"cost_per_round"`
	Batches       int     `json:"batches_finished"`
	LatencyP50Ms  float64 `json:"round_latency_p50_ms"`
	LatencyP99Ms  float64 `json:"round_latency_p99_ms"`
	TurnsGuessed  int     `json:"turns_with_guesses"`
	RobotsHeld    int     `json:"robot_rounds_held"`
	AgentdMaxRSS  int64   `json:"agentd_max_rss_kb"`
	DecisionLog   string  `json:"decision_log"`
	ProcessLogDir string  `json:"process_logs"`
}

func cmdFleet(args []string) error {
	fs := newFlags("fleet", "Runs a whole fleet on this machine: an embedded NATS server, the coordinator and\none agentd per robot as separate processes; the simulator plays the world through\neach robot's local interface and prints per-round progress and a summary.")
	o := fleetOpts{slow: faults{}}
	o.sc.register(fs)
	fs.IntVar(&o.rounds, "rounds", 200, "rounds to play")
	fs.Uint64Var(&o.seed, "seed", 1, "run seed (world and fleet seeds derive from it, as in sim compare's episode 0)")
	fs.StringVar(&o.mode, "mode", "hybrid", "sequential, parallel or hybrid")
	fs.DurationVar(&o.turnDeadline, "turn-deadline", 200*time.Millisecond, "time each turn gets")
	fs.IntVar(&o.samples, "samples", 16, "Monte Carlo samples per Q-factor")
	fs.IntVar(&o.horizon, "horizon", 20, "base-policy steps simulated after the first step")
	fs.DurationVar(&o.period, "period", 0, "start rounds at most this often (0: back to back)")
	fs.StringVar(&o.fleet, "fleet", "demo", "fleet id")
	fs.StringVar(&o.prefix, "prefix", "baton", "NATS subject prefix")
	fs.StringVar(&o.logDir, "logs", "", "directory for the processes' logs and the decision log (default: a new temp dir)")
	asJSON := fs.Bool("json", false, "print the summary as one JSON object (no per-round lines)")
	quiet := fs.Bool("quiet", false, "no per-round lines")
	fs.Var(o.slow, "slow", "fault injection: ROBOT=DELAY holds back that robot's decisions (repeatable)")
	fs.StringVar(&o.guess, "guess", "base", "guess source for predecessors not heard in time: base, last, recompute or learned")
	fs.StringVar(&o.guessModel, "guess-model", "", "model file from sim train, distributed to the robots (for --guess learned)")
	if err := parse(fs, args); err != nil {
		return err
	}
	var err error
	if o.exe, err = os.Executable(); err != nil {
		return err
	}
	if o.logDir == "" {
		if o.logDir, err = os.MkdirTemp("", "baton-fleet-"); err != nil {
			return err
		}
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	f, err := startFleet(ctx, o)
	if err != nil {
		return err
	}
	defer f.close()
	m := f.m
	if !*asJSON {
		fmt.Printf("fleet %s: %s, %d robots, %s mode, NATS %s, logs in %s\n", o.fleet, m.Name(), m.Robots(), o.mode, f.url, o.logDir)
	}
	var lat []float64
	sum := fleetSummary{Scenario: m.Name(), Robots: m.Robots(), Mode: o.mode, Guess: o.guess, DecisionLog: f.decisionLog(), ProcessLogDir: o.logDir}
	for round := 1; round <= o.rounds && ctx.Err() == nil; round++ {
		res := f.play(round)
		lat = append(lat, float64(res.LatencyUs)/1000)
		sum.Rounds, sum.TurnsGuessed, sum.RobotsHeld = round, sum.TurnsGuessed+res.Guessed, sum.RobotsHeld+res.Held
		if !*asJSON && !*quiet {
			fmt.Printf("round %4d/%d  stage cost %7.2f  latency %7.2f ms  guessed %2d  held %2d\n",
				round, o.rounds, res.Cost, float64(res.LatencyUs)/1000, res.Guessed, res.Held)
		}
	}
	for _, p := range f.robots {
		if p != nil && !p.exited() {
			sum.AgentdMaxRSS = max(sum.AgentdMaxRSS, rssKB(p.cmd.Process.Pid))
		}
	}
	sum.Cost, sum.Batches = f.world.Cost, f.world.Batch
	if sum.Rounds > 0 {
		sum.CostPerRound = sum.Cost / float64(sum.Rounds)
	}
	sum.LatencyP50Ms, sum.LatencyP99Ms = quantile(lat, 0.5), quantile(lat, 0.99)
	f.close()
	interrupted := ctx.Err() != nil
	if *asJSON {
		enc := json.NewEncoder(os.Stdout)
		enc.SetIndent("", "  ")
		if err := enc.Encode(sum); err != nil || !interrupted {
			return err
		}
		return fmt.Errorf("%w after %d of %d rounds", errInterrupted, sum.Rounds, o.rounds)
	}
	fmt.Printf("\n%d rounds, total cost %.2f (%.3f per round), %d batches of slicks or tasks finished\n", sum.Rounds, sum.Cost, sum.CostPerRound, sum.Batches)
	fmt.Printf("round latency p50 %.2f ms, p99 %.2f ms; turns decided with guesses %d; robot-rounds held %d\n",
		sum.LatencyP50Ms, sum.LatencyP99Ms, sum.TurnsGuessed, sum.RobotsHeld)
	if sum.AgentdMaxRSS > 0 {
		fmt.Printf("largest agentd resident memory %.1f MB\n", float64(sum.AgentdMaxRSS)/1024)
	}
	fmt.Printf("decision log %s\n", f.decisionLog())
	if interrupted {
		return fmt.Errorf("%w after %d of %d rounds", errInterrupted, sum.Rounds, o.rounds)
	}
	return nil
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

func freePorts(n int) ([]int, error) {
	var ls []net.Listener
	defer func() {
		for _, l := range ls {
			l.Close()
		}
	}()
	var ports []int
	for range n {
		l, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			return nil, err
		}
		ls = append(ls, l)
		ports = append(ports, l.Addr().(*net.TCPAddr).Port)
	}
	return ports, nil
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

func quantile(xs []float64, q float64) float64 {
	if len(xs) == 0 {
		return 0
	}
	s := append([]float64(nil), xs...)
	sort.Float64s(s)
	return s[int(q*float64(len(s)-1)+0.5)]
}
