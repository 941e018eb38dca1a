package cli

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"os"
	"os/signal"
	"regexp"
	"sort"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"time"

	"baton/agentd/node"
	"baton/sim/episode"
	"baton/sim/fleetsum"
	"baton/sim/model"
	"baton/sim/world"
)

// driveOpts configures `sim drive`: the world to play and where the
// robots' local interfaces are.
type driveOpts struct {
	sc        scenarioFlags
	bases     []string // one local interface per robot, in robot order
	token     string   // bearer token for every request ("" sends none)
	rounds    int
	seed      uint64
	wait      time.Duration
	asJSON    bool
	quiet     bool
	healthDue time.Duration // how often each robot's /healthz is probed during rounds
	patience  time.Duration // how long the preflight retries a robot that does not answer
}

// Probing every robot's /healthz this often while rounds play costs a few
// hundred bytes per probe (about 10 kbit/s per robot), little even on a
// rate-limited radio link, and catches a NATS outage of a fifth of a second.
const defaultHealthEvery = 200 * time.Millisecond

// The agentd local interface refuses waits over a minute.
const maxDecisionWait = time.Minute

func cmdDrive(args []string) error { return drive(args, os.Stdout) }

func drive(args []string, out io.Writer) error {
	fs := newFlags("drive", `Plays the simulated world through the local interfaces of robots whose daemons
(agentd, with a coordinator and NATS) already run elsewhere: another host, or
a network namespace (deploy/lab.sh). Each round it reads every robot's
decision once its round closed, steps the world with what the robots carried
out (a hold is control 0) and posts every robot's observation, exactly as
sim fleet does with the daemons it starts itself.

The scenario flags and --seed must be the fleet's: the world is the one
sim fleet --seed S plays. The coordinator decides what sim fleet --seed S
decides when it runs with --seed set to what --print-coordinator-seed prints
(and sim fleet's round flags).

It exits 0 only when every round completed for every live robot: a robot
that held in a round (no decision served, or "hold": true) is a failure
unless its daemon was down or cut off from NATS in that round, that is its
local interface did not answer the decision request, or a /healthz probe
during the round (every 200 ms, and once more when it held) did not answer
or answered 503 "not connected to NATS", or the hold it served says it had
lost contact with NATS. Any other hold fails the drive, also when /healthz
says 503 because no round has started for a while (the coordinator is
gone) or round starts are refused: those are the fleet's failures, not
the robot's. The failure names the rounds and robots and why each held.

  sim drive --robot-http http://10.0.0.11:7400,http://10.0.0.12:7400 \
      --http-token-file /etc/baton/http.token --rounds 100 --seed 1`)
	var o driveOpts
	o.sc.register(fs)
	robotHTTP := fs.String("robot-http", "", "the robots' local interfaces, comma-separated base URLs in robot order (robot 0 first), e.g. http://10.0.0.11:7400,http://10.0.0.12:7400 (required)")
	tokenFile := fs.String("http-token-file", "", "file with the bearer token every request carries (the robots' agentd --http-token-file)")
	fs.IntVar(&o.rounds, "rounds", 200, "rounds to play (the coordinator's --rounds, or fewer)")
	fs.Uint64Var(&o.seed, "seed", 1, "run seed: the world is the one sim fleet --seed plays")
	fs.DurationVar(&o.wait, "wait", 15*time.Second, "how long to wait for a round's decision before the robot holds (up to 1m)")
	fs.BoolVar(&o.asJSON, "json", false, "print the summary as one JSON object (no per-round lines)")
	fs.BoolVar(&o.quiet, "quiet", false, "no per-round lines")
	printSeed := fs.Bool("print-coordinator-seed", false, "print the coordinator --seed that decides what sim fleet --seed decides, and exit")
	if err := parse(fs, args); err != nil {
		return err
	}
	if *printSeed {
		fmt.Fprintln(out, episode.FleetSeed(episode.Seed(o.seed, 0)))
		return nil
	}
	var err error
	if o.bases, err = parseRobotHTTP(*robotHTTP); err != nil {
		return err
	}
	if o.sc.robots == 0 {
		o.sc.robots = len(o.bases)
	}
	if *tokenFile != "" {
		if o.token, err = node.ReadToken(*tokenFile); err != nil {
			return err
		}
	}
	o.healthDue, o.patience = defaultHealthEvery, preflightPatience
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	return runDrive(ctx, o, out)
}

// parseRobotHTTP reads --robot-http: absolute http(s) URLs of a host and
// port, with no query; a path prefix is kept (a gateway in front of the
// robots), a trailing slash dropped.
func parseRobotHTTP(s string) ([]string, error) {
	if strings.TrimSpace(s) == "" {
		return nil, errors.New("--robot-http is required: the robots' local interfaces in robot order, e.g. http://10.0.0.11:7400,http://10.0.0.12:7400")
	}
	var bases []string
	seen := map[string]int{}
	for i, raw := range strings.Split(s, ",") {
		raw = strings.TrimSpace(raw)
		u, err := url.Parse(raw)
		bad := func(why string) error {
			return fmt.Errorf("--robot-http: URL %d (robot %d) %q: %s; want http://HOST:PORT", i+1, i, raw, why)
		}
		switch {
		case raw == "":
			return nil, bad("empty")
		case err != nil:
			return nil, bad(strings.TrimPrefix(err.Error(), "parse "+strconv.Quote(raw)+": "))
		case u.Scheme != "http" && u.Scheme != "https":
			return nil, bad("not an http or https URL")
		case u.Host == "" || u.Hostname() == "":
			return nil, bad("no host")
		case u.User != nil:
			return nil, bad("credentials belong in --http-token-file, not the URL")
		case u.RawQuery != "" || u.Fragment != "":
			return nil, bad("no query or fragment, please")
		}
		if p := u.Port(); p != "" {
			if n, err := strconv.Atoi(p); err != nil || n < 1 || n > 65535 {
				return nil, bad("bad port")
			}
		}
		base := strings.TrimRight(u.String(), "/")
		if j, dup := seen[base]; dup {
			return nil, fmt.Errorf("--robot-http: %s is given for robot %d and robot %d: every robot has its own daemon", base, j, i)
		}
		seen[base] = i
		bases = append(bases, base)
	}
	return bases, nil
}

// runDrive plays o.rounds rounds against running daemons and prints what
// sim fleet prints.
func runDrive(ctx context.Context, o driveOpts, out io.Writer) error {
	m, err := o.sc.load()
	if err != nil {
		return err
	}
	fm, ok := m.(model.Fleet)
	if !ok {
		return fmt.Errorf("scenario %s cannot run as a fleet", m.Name())
	}
	if o.rounds < 1 {
		return fmt.Errorf("--rounds %d: want at least 1 round to play", o.rounds)
	}
	if o.wait <= 0 || o.wait > maxDecisionWait {
		return fmt.Errorf("--wait %s: want a duration above 0 and up to %s (the local interface's limit)", o.wait, maxDecisionWait)
	}
	if m.Robots() != len(o.bases) {
		return fmt.Errorf("--robot-http names %d robots, the scenario has %d (--robots): give one URL per robot, in robot order", len(o.bases), m.Robots())
	}
	tr := newDriveTransport(o.bases, o.token)
	// Every request is bounded: a robot that stops answering (its host
	// gone without a word) holds, it does not stop the drive.
	client := &http.Client{Transport: tr, Timeout: o.wait + 10*time.Second}
	fleetID, err := preflight(ctx, client, o)
	if err != nil {
		return err
	}
	ep := episode.Seed(o.seed, 0)
	// Only what play and report use: no processes, no NATS.
	f := &fleetRun{o: fleetOpts{sc: o.sc, seed: o.seed}, m: fm, bases: o.bases, client: client, world: world.New(fm, ep),
		u: make([]int, len(o.bases)), wait: o.wait}
	if !o.asJSON {
		fmt.Fprintf(out, "drive %s: %s, %d robots at %s; the world of sim fleet --seed %d (a coordinator with --seed %d decides as it does)\n",
			fleetID, m.Name(), m.Robots(), strings.Join(o.bases, ","), o.seed, episode.FleetSeed(ep))
	}
	health := watchHealth(ctx, client, o.bases, o.healthDue)
	defer health.stop()

	// Mode and guess source are the coordinator's, which the robots'
	// interfaces do not tell: left empty.
	sum := fleetsum.Summary{Scenario: m.Name(), Robots: m.Robots()}
	tally := fleetsum.NewTally()
	var holds []driveHold
	f.report(0)
	t0 := time.Now()
	for round := 1; round <= o.rounds && ctx.Err() == nil; round++ {
		before := health.failures()
		res := f.play(round)
		tally.Add(&sum, res)
		rh := judgeRound(ctx, client, tr, health, before, res)
		holds = append(holds, rh...)
		if !o.asJSON && !o.quiet {
			fmt.Fprintf(out, "round %4d/%d  stage cost %7.2f  latency %7.2f ms  guessed %2d  held %2d%s\n",
				res.Round, o.rounds, res.Cost, float64(res.LatencyUs)/1000, res.Guessed, res.Held, heldNote(rh))
		}
	}
	sum.WallSeconds = time.Since(t0).Seconds()
	sum.Batches = f.world.Batch
	tally.Finish(&sum)
	health.stop()
	var failed, excused []driveHold
	for _, h := range holds {
		if h.Excused {
			excused = append(excused, h)
		} else {
			failed = append(failed, h)
		}
	}
	interrupted := ctx.Err() != nil
	if o.asJSON {
		rep := driveReport{Summary: sum, Holds: holds, Failed: len(failed), Excused: len(excused),
			OK: len(failed) == 0 && !interrupted, RefusedObservations: tr.refusedCount()}
		if rep.Holds == nil {
			rep.Holds = []driveHold{}
		}
		enc := json.NewEncoder(out)
		enc.SetIndent("", "  ")
		if err := enc.Encode(rep); err != nil {
			return err
		}
	} else {
		fmt.Fprintf(out, "\n%d rounds, total cost %.2f (%.3f per round), %d batches of slicks or tasks finished\n", sum.Rounds, sum.Cost, sum.CostPerRound, sum.Batches)
		fmt.Fprintf(out, "round latency p50 %.2f ms, p99 %.2f ms; turns decided with guesses %d; robot-rounds held %d\n",
			sum.LatencyP50Ms, sum.LatencyP99Ms, sum.TurnsGuessed, sum.RobotsHeld)
		fmt.Fprintf(out, "%.1f rounds per second of wall time\n", sum.RoundsPerSecond)
		fmt.Fprintf(out, "decisions sha256 %s\n", sum.DecisionsSHA256)
		fmt.Fprintf(out, "robot-rounds held while the daemon was down or cut off from NATS (not failures): %d\n", len(excused))
		if n := tr.refusedCount(); n > 0 {
			fmt.Fprintf(out, "observations refused by the robots: %d (first: %s)\n", n, tr.firstRefusal())
		}
	}
	if interrupted {
		return fmt.Errorf("%w after %d of %d rounds", errInterrupted, sum.Rounds, o.rounds)
	}
	if len(failed) > 0 {
		return fmt.Errorf("%d robot-rounds held while their daemons were up and healthy: %s", len(failed), describeHolds(failed))
	}
	return nil
}

// driveReport is `sim drive --json`: sim fleet's summary plus every hold.
type driveReport struct {
	fleetsum.Summary
	Holds               []driveHold `json:"holds"`
	Failed              int         `json:"failed_robot_rounds"`
	Excused             int         `json:"excused_robot_rounds"`
	RefusedObservations int         `json:"refused_observations"`
	OK                  bool        `json:"ok"`
}

// driveHold is one robot that held in one round, and why.
type driveHold struct {
	Round int    `json:"round"`
	Robot int    `json:"robot"`
	Why   string `json:"why"`
	// Excused: its daemon was down or cut off from NATS in that round, so
	// holding was the right thing for it to do.
	Excused bool `json:"excused"`
}

func heldNote(hs []driveHold) string {
	if len(hs) == 0 {
		return ""
	}
	var ids, down []string
	for _, h := range hs {
		ids = append(ids, strconv.Itoa(h.Robot))
		if h.Excused {
			down = append(down, strconv.Itoa(h.Robot))
		}
	}
	s := "  robots " + strings.Join(ids, ",")
	if len(down) > 0 {
		s += " (down or cut off: " + strings.Join(down, ",") + ")"
	}
	return s
}

// describeHolds names the rounds and robots, at most 12 rounds of them.
func describeHolds(hs []driveHold) string {
	byRound := map[int][]driveHold{}
	var rounds []int
	for _, h := range hs {
		if _, ok := byRound[h.Round]; !ok {
			rounds = append(rounds, h.Round)
		}
		byRound[h.Round] = append(byRound[h.Round], h)
	}
	sort.Ints(rounds)
	var parts []string
	for i, r := range rounds {
		if i == 12 {
			parts = append(parts, fmt.Sprintf("and %d more rounds", len(rounds)-i))
			break
		}
		var robots []string
		for _, h := range byRound[r] {
			robots = append(robots, fmt.Sprintf("robot %d (%s)", h.Robot, h.Why))
		}
		parts = append(parts, fmt.Sprintf("round %d: %s", r, strings.Join(robots, ", ")))
	}
	return strings.Join(parts, "; ")
}

// judgeRound says, for every robot that held in res, why, and whether its
// daemon was down or cut off from NATS in the round (which excuses the
// hold: holding is then the right thing for it to do).
func judgeRound(ctx context.Context, c *http.Client, tr *driveTransport, h *healthWatch, before []uint64, res fleetsum.Round) []driveHold {
	var out []driveHold
	for r, d := range res.Decided {
		if d >= 0 {
			continue
		}
		seen := tr.lastDecision(r)
		hold := driveHold{Round: res.Round, Robot: r}
		var lostNATS bool
		switch {
		case seen.round != res.Round:
			hold.Why = "no decision request recorded" // cannot happen: play asks every robot
		case seen.err != nil:
			hold.Why, hold.Excused = "daemon down: its local interface did not answer: "+shortErr(seen.err), true
		case seen.status != http.StatusOK:
			hold.Why = fmt.Sprintf("the decision request was answered %d: %s", seen.status, strings.TrimSpace(seen.body))
		default:
			hold.Why = "held: " + seen.view.Reason
			if seen.view.Reason == "" {
				hold.Why = "held"
			}
			lostNATS = strings.Contains(seen.view.Reason, "NATS")
		}
		if !hold.Excused {
			if bad, why := h.failedSince(r, before); bad {
				hold.Why += "; /healthz during the round: " + why
				hold.Excused = true
			} else if cut, why := probeHealth(ctx, c, tr.bases[r]); cut {
				hold.Why += "; /healthz now: " + why
				hold.Excused = true
			} else if lostNATS {
				hold.Excused = true
			}
		}
		out = append(out, hold)
	}
	return out
}

func shortErr(err error) string {
	var ue *url.Error
	if errors.As(err, &ue) {
		err = ue.Err
	}
	return err.Error()
}

// healthWatch probes every robot's /healthz at a fixed rate and counts
// the probes that found the daemon down or cut off from NATS.
type healthWatch struct {
	bad    []atomic.Uint64
	mu     sync.Mutex
	why    []string // the last such probe's answer, per robot
	cancel context.CancelFunc
	done   sync.WaitGroup
	once   sync.Once
}

func watchHealth(ctx context.Context, c *http.Client, bases []string, every time.Duration) *healthWatch {
	if every <= 0 {
		every = defaultHealthEvery
	}
	ctx, cancel := context.WithCancel(ctx)
	h := &healthWatch{bad: make([]atomic.Uint64, len(bases)), why: make([]string, len(bases)), cancel: cancel}
	for r, b := range bases {
		h.done.Add(1)
		go func() {
			defer h.done.Done()
			t := time.NewTicker(every)
			defer t.Stop()
			for {
				if cut, why := probeHealth(ctx, c, b); cut && ctx.Err() == nil {
					h.mu.Lock()
					h.why[r] = why
					h.mu.Unlock()
					h.bad[r].Add(1)
				}
				select {
				case <-ctx.Done():
					return
				case <-t.C:
				}
			}
		}()
	}
	return h
}

func (h *healthWatch) failures() []uint64 {
	out := make([]uint64, len(h.bad))
	for r := range h.bad {
		out[r] = h.bad[r].Load()
	}
	return out
}

func (h *healthWatch) failedSince(r int, before []uint64) (bool, string) {
	if h.bad[r].Load() == before[r] {
		return false, ""
	}
	h.mu.Lock()
	defer h.mu.Unlock()
	return true, h.why[r]
}

func (h *healthWatch) stop() {
	h.once.Do(func() {
		h.cancel()
		h.done.Wait()
	})
}

// probeHealth asks a robot's /healthz once (bounded by a second). cut:
// the daemon is down or cut off from NATS (no answer, or a 503 that says
// it is not connected), with the answer. Other 503s (no round start for
// a while, round starts refused) are the fleet's trouble, not the
// robot's, and do not count.
func probeHealth(ctx context.Context, c *http.Client, base string) (cut bool, why string) {
	ctx, cancel := context.WithTimeout(ctx, time.Second)
	defer cancel()
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, base+"/healthz", nil)
	if err != nil {
		return false, err.Error()
	}
	resp, err := c.Do(req)
	if err != nil {
		return true, "no answer: " + shortErr(err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(io.LimitReader(resp.Body, 4096))
	text := strings.TrimSpace(string(b))
	if resp.StatusCode != http.StatusOK && strings.Contains(text, "not connected to NATS") {
		return true, fmt.Sprintf("%d %s", resp.StatusCode, text)
	}
	return false, ""
}

var healthzRobot = regexp.MustCompile(`robot (\d+) fleet (\S+?):? `)

// preflight checks every robot before the first round: its local
// interface answers, it is the robot its place in --robot-http says, all
// are in one fleet, the token is accepted, and no round has started yet
// (a drive plays from round 1). It returns the fleet id.
func preflight(ctx context.Context, c *http.Client, o driveOpts) (string, error) {
	errs := make([]error, len(o.bases))
	fleets := make([]string, len(o.bases))
	var wg sync.WaitGroup
	for r, b := range o.bases {
		wg.Add(1)
		go func() {
			defer wg.Done()
			fleets[r], errs[r] = checkRobot(ctx, c, r, b, o.token != "", o.patience)
		}()
	}
	wg.Wait()
	if err := errors.Join(errs...); err != nil {
		return "", err
	}
	for r := range fleets {
		if fleets[r] != fleets[0] {
			return "", fmt.Errorf("--robot-http: robot 0 (%s) is in fleet %q, robot %d (%s) in fleet %q: one drive plays one fleet",
				o.bases[0], fleets[0], r, o.bases[r], fleets[r])
		}
	}
	return fleets[0], nil
}

// How long the preflight keeps trying a robot whose interface does not
// answer yet (a daemon still starting).
const preflightPatience = 5 * time.Second

func checkRobot(ctx context.Context, c *http.Client, r int, base string, haveToken bool, patience time.Duration) (string, error) {
	var resp *http.Response
	var err error
	deadline := time.Now().Add(patience)
	for {
		req, rerr := http.NewRequestWithContext(ctx, http.MethodGet, base+"/healthz", nil)
		if rerr != nil {
			return "", fmt.Errorf("robot %d at %s: %w", r, base, rerr)
		}
		cctx, cancel := context.WithTimeout(ctx, 3*time.Second)
		resp, err = c.Do(req.WithContext(cctx))
		if err == nil {
			defer cancel()
			break
		}
		cancel()
		if time.Now().After(deadline) || ctx.Err() != nil {
			return "", fmt.Errorf("robot %d at %s is unreachable: %s", r, base, shortErr(err))
		}
		time.Sleep(250 * time.Millisecond)
	}
	body, _ := io.ReadAll(io.LimitReader(resp.Body, 4096))
	resp.Body.Close()
	text := strings.TrimSpace(string(body))
	if resp.StatusCode != http.StatusOK && resp.StatusCode != http.StatusServiceUnavailable {
		return "", fmt.Errorf("robot %d at %s: /healthz answered %s (%.80q): is this an agentd local interface?", r, base, resp.Status, text)
	}
	mm := healthzRobot.FindStringSubmatch(text + " ")
	if mm == nil {
		return "", fmt.Errorf("robot %d at %s: /healthz answered %q, not an agentd's", r, base, text)
	}
	if got, _ := strconv.Atoi(mm[1]); got != r {
		return "", fmt.Errorf("--robot-http: URL %d (%s) serves robot %d, not robot %d: give the URLs in robot order", r+1, base, got, r)
	}
	if resp.StatusCode != http.StatusOK {
		return "", fmt.Errorf("robot %d at %s is not ready: %s", r, base, text)
	}
	if i := strings.LastIndex(text, " round "); i >= 0 {
		if n, err := strconv.ParseUint(text[i+len(" round "):], 10, 64); err == nil && n > 0 {
			return "", fmt.Errorf("robot %d at %s is already in round %d: a drive plays a coordinator's run from round 1; start the coordinator again (with --rounds) and then the drive", r, base, n)
		}
	}
	// The token: one decision request (the current round, no wait).
	cctx, cancel := context.WithTimeout(ctx, 3*time.Second)
	defer cancel()
	req, _ := http.NewRequestWithContext(cctx, http.MethodGet, base+"/v1/decision?wait=0s", nil)
	resp, err = c.Do(req)
	if err != nil {
		return "", fmt.Errorf("robot %d at %s is unreachable: %s", r, base, shortErr(err))
	}
	body, _ = io.ReadAll(io.LimitReader(resp.Body, 4096))
	resp.Body.Close()
	switch {
	case resp.StatusCode == http.StatusUnauthorized && haveToken:
		return "", fmt.Errorf("robot %d at %s refused the token (401 Unauthorized): --http-token-file must hold the robot's agentd --http-token-file token", r, base)
	case resp.StatusCode == http.StatusUnauthorized:
		return "", fmt.Errorf("robot %d at %s wants a token (401 Unauthorized): give --http-token-file", r, base)
	case resp.StatusCode != http.StatusOK:
		return "", fmt.Errorf("robot %d at %s: /v1/decision answered %s: %s", r, base, resp.Status, strings.TrimSpace(string(body)))
	}
	return mm[2], nil
}

// driveTransport adds the bearer token to every request and keeps each
// robot's last decision answer (what play does not return: why a robot
// held, or that its daemon did not answer) and refused observations.
type driveTransport struct {
	base  http.RoundTripper
	token string
	bases []string

	mu      sync.Mutex
	last    []decisionSeen
	refused []string
}

type decisionSeen struct {
	round  int
	err    error
	status int
	body   string
	view   node.View
}

func newDriveTransport(bases []string, token string) *driveTransport {
	base := http.DefaultTransport.(*http.Transport).Clone()
	// A decision wait and a health probe run at once for every robot.
	base.MaxIdleConnsPerHost = 4
	return &driveTransport{base: base, token: token, bases: bases, last: make([]decisionSeen, len(bases))}
}

func (t *driveTransport) robotOf(u *url.URL) int {
	s := u.String()
	for r, b := range t.bases {
		if strings.HasPrefix(s, b+"/") {
			return r
		}
	}
	return -1
}

func (t *driveTransport) RoundTrip(req *http.Request) (*http.Response, error) {
	if t.token != "" {
		req = req.Clone(req.Context())
		req.Header.Set("Authorization", "Bearer "+t.token)
	}
	resp, err := t.base.RoundTrip(req)
	r := t.robotOf(req.URL)
	if r < 0 {
		return resp, err
	}
	switch strings.TrimPrefix(req.URL.Path, strings.TrimSuffix(mustPath(t.bases[r]), "/")) {
	case "/v1/decision":
		round, _ := strconv.Atoi(req.URL.Query().Get("round"))
		seen := decisionSeen{round: round, err: err}
		if err == nil {
			b, rerr := io.ReadAll(io.LimitReader(resp.Body, 1<<20))
			resp.Body.Close()
			resp.Body = io.NopCloser(bytes.NewReader(b))
			seen.status, seen.body = resp.StatusCode, string(b)
			if rerr != nil {
				seen.err = rerr
			} else if resp.StatusCode == http.StatusOK {
				_ = json.Unmarshal(b, &seen.view)
			}
		}
		t.mu.Lock()
		t.last[r] = seen
		t.mu.Unlock()
	case "/v1/observation":
		if err == nil && resp.StatusCode >= 300 {
			b, _ := io.ReadAll(io.LimitReader(resp.Body, 4096))
			resp.Body.Close()
			resp.Body = io.NopCloser(bytes.NewReader(b))
			t.mu.Lock()
			t.refused = append(t.refused, fmt.Sprintf("robot %d: %s %s", r, resp.Status, strings.TrimSpace(string(b))))
			t.mu.Unlock()
		}
	}
	return resp, err
}

func mustPath(base string) string {
	u, err := url.Parse(base)
	if err != nil {
		return ""
	}
	return u.Path
}

func (t *driveTransport) lastDecision(r int) decisionSeen {
	t.mu.Lock()
	defer t.mu.Unlock()
	return t.last[r]
}

func (t *driveTransport) refusedCount() int {
	t.mu.Lock()
	defer t.mu.Unlock()
	return len(t.refused)
}

func (t *driveTransport) firstRefusal() string {
	t.mu.Lock()
	defer t.mu.Unlock()
	if len(t.refused) == 0 {
		return ""
	}
	return t.refused[0]
}
