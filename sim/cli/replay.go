package cli

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"net"
	"net/http"
	"os"
	"os/signal"
	"strings"
	"syscall"
	"text/tabwriter"
	"time"

	"github.com/nats-io/nats.go"
	"go.uber.org/zap"

	"baton/coordinator/hub"
	"baton/coordinator/view"
	"baton/deploy/shell"
	"baton/sim/model"
)

// A decision log, as the coordinator keeps it (hub.Line per record), put
// back together: the durable stream's write-ahead and filed records of one
// round become one round; the file log (--decision-log) has filed records
// only. Rounds are numbered on across coordinator runs (epochs), so a log
// is one sequence 1..N, each round closed once.

// replayRound is one round of the episode.
type replayRound struct {
	hub.Line
	// Filed: its reports were filed (stage cost logged). A round with
	// only its write-ahead record was closed by a coordinator that died
	// before the reports came.
	Filed bool
	// Recomputed is the stage cost of the logged state under the controls
	// carried out, computed again here.
	Recomputed float64
}

// replayRun is one coordinator run's share of the log.
type replayRun struct {
	Epoch      uint64  `json:"epoch"`
	First      uint64  `json:"first_round"`
	Last       uint64  `json:"last_round"`
	Rounds     int     `json:"rounds"`
	Unfiled    int     `json:"closed_not_filed"`
	Held       int     `json:"robot_rounds_held"`
	Logged     float64 `json:"logged_stage_cost"`
	Recomputed float64 `json:"recomputed_stage_cost"`
}

// replayResult is what `sim replay` reports.
type replayResult struct {
	Source   string `json:"source"`
	Scenario string `json:"scenario"`
	Robots   int    `json:"robots"`
	Digest   string `json:"digest"`
	// StageKind says what the logged stage costs are (model.StageKind).
	StageKind string      `json:"stage_kind"`
	Rounds    int         `json:"rounds"`
	First     uint64      `json:"first_round"`
	Last      uint64      `json:"last_round"`
	Runs      []replayRun `json:"runs"`
	Gaps      []uint64    `json:"missing_rounds"`
	Doubled   []uint64    `json:"doubled_rounds"`
	Interrupt int         `json:"interrupted_records"`
	// Cost is the episode's cost recomputed from the log: the sum of every
	// round's stage cost (the coordinator's: for belief scenarios the
	// expectation over its belief). Logged sums the filed rounds' logged
	// stage costs; MaxDiff is the largest difference on one filed round.
	Cost    float64 `json:"cost"`
	Logged  float64 `json:"logged_cost"`
	MaxDiff float64 `json:"max_stage_difference"`
	// StageCosts are the recomputed per-round costs, in round order.
	StageCosts []float64 `json:"stage_costs"`

	rounds []replayRound
}

// costOf is the recomputed cost of the log's first n rounds.
func (r replayResult) costOf(n int) float64 {
	c := 0.0
	for _, s := range r.StageCosts[:min(n, len(r.StageCosts))] {
		c += s
	}
	return c
}

// Continuous: every round from the first to the last is there once.
func (r replayResult) Continuous() bool { return len(r.Gaps) == 0 && len(r.Doubled) == 0 }

// Summary says in one line what the log holds.
func (r replayResult) Summary() string {
	if r.Rounds == 0 {
		return "no rounds"
	}
	s := fmt.Sprintf("rounds %d-%d in %d run(s)", r.First, r.Last, len(r.Runs))
	if !r.Continuous() {
		return s + fmt.Sprintf(", missing rounds %v, doubled rounds %v", r.Gaps, r.Doubled)
	}
	return s + ", no gap, no doubled round"
}

// maxLogLines bounds a log read into memory (about 50 MB of records for
// the largest fleets at 200,000 rounds).
const maxLogLines = 1_000_000

// readLogFile reads a decision-log file or an export, one JSON record per
// line.
func readLogFile(path string) ([]hub.Line, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("decision log: %w", err)
	}
	defer f.Close()
	var out []hub.Line
	sc := bufio.NewScanner(f)
	sc.Buffer(nil, shell.MaxJournalRecord)
	for n := 1; sc.Scan(); n++ {
		if len(bytes.TrimSpace(sc.Bytes())) == 0 {
			continue
		}
		if n > maxLogLines {
			return nil, fmt.Errorf("decision log %s: more than %d lines", path, maxLogLines)
		}
		l, err := parseLogLine(sc.Bytes())
		if err != nil {
			return nil, fmt.Errorf("decision log %s line %d: %w", path, n, err)
		}
		out = append(out, l)
	}
	if err := sc.Err(); err != nil {
		return nil, fmt.Errorf("decision log %s: %w (a line longer than %d bytes?)", path, err, shell.MaxJournalRecord)
	}
	return out, nil
}

func parseLogLine(b []byte) (hub.Line, error) {
	var l hub.Line
	if err := json.Unmarshal(b, &l); err != nil {
		return l, err
	}
	switch {
	case l.Round == 0:
		return l, errors.New("no round number (not a decision-log record)")
	case l.Kind != "" && l.Kind != shell.JournalClosed:
		return l, fmt.Errorf("unknown record kind %q", l.Kind)
	}
	return l, nil
}

// readLogStream reads a fleet's durable log; raw, when not nil, receives
// every record as stored (an export).
func readLogStream(ctx context.Context, nc *nats.Conn, prefix, fleet string, raw io.Writer) ([]hub.Line, error) {
	var out []hub.Line
	err := shell.ReadJournal(ctx, nc, prefix, fleet, func(r shell.JournalRecord) error {
		if len(out) >= maxLogLines {
			return fmt.Errorf("decision log stream: more than %d records", maxLogLines)
		}
		l, err := parseLogLine(r.Data)
		if err != nil {
			return fmt.Errorf("decision log stream record %d: %w", r.Sequence, err)
		}
		if (r.Kind == shell.JournalClosed) != (l.Kind == shell.JournalClosed) {
			return fmt.Errorf("decision log stream record %d: kind %q on the %s subject", r.Sequence, l.Kind, r.Kind)
		}
		out = append(out, l)
		if raw != nil {
			if _, err := raw.Write(append(bytes.TrimSpace(r.Data), '\n')); err != nil {
				return err
			}
		}
		return nil
	})
	return out, err
}

// assemble puts a log's records together into rounds and checks the
// numbering; then recomputes every round's stage cost on m (digest: the
// scenario's, checked against every record's).
func assemble(lines []hub.Line, m model.Fleet, digest string) (replayResult, error) {
	res := replayResult{Scenario: m.Name(), Robots: m.Robots(), Digest: digest, StageKind: model.StageKind(m)}
	type key struct{ epoch, round uint64 }
	at := map[key]int{}
	for _, l := range lines {
		if l.Interrupted {
			// Filed by a coordinator stopped mid-round: not a closed
			// round (the next run plays that round again).
			res.Interrupt++
			continue
		}
		k := key{l.Epoch, l.Round}
		i, seen := at[k]
		switch {
		case seen && l.Kind == shell.JournalClosed:
			continue // the same write-ahead record again
		case seen:
			res.rounds[i].Line, res.rounds[i].Filed = l, true
		default:
			at[k] = len(res.rounds)
			res.rounds = append(res.rounds, replayRound{Line: l, Filed: l.Kind == ""})
		}
	}
	for i, r := range res.rounds {
		if r.Digest != "" && digest != "" && r.Digest != digest {
			return res, fmt.Errorf("round %d (run %d) was decided on scenario digest %s; the scenario given here (--scenario, --config, --robots) has %s",
				r.Round, r.Epoch, r.Digest, digest)
		}
		stage, err := recompute(m, r.Line)
		if err != nil {
			return res, fmt.Errorf("round %d (run %d): %w", r.Round, r.Epoch, err)
		}
		res.rounds[i].Recomputed = stage
		res.Cost += stage
		res.StageCosts = append(res.StageCosts, stage)
		if i == 0 {
			res.First = r.Round
		} else if prev := res.rounds[i-1].Round; r.Round <= prev {
			res.Doubled = append(res.Doubled, r.Round)
		} else {
			for g := prev + 1; g < r.Round && len(res.Gaps) < 100; g++ {
				res.Gaps = append(res.Gaps, g)
			}
		}
		res.Last = max(res.Last, r.Round)
		if len(res.Runs) == 0 || res.Runs[len(res.Runs)-1].Epoch != r.Epoch {
			res.Runs = append(res.Runs, replayRun{Epoch: r.Epoch, First: r.Round})
		}
		run := &res.Runs[len(res.Runs)-1]
		run.Last, run.Rounds = r.Round, run.Rounds+1
		run.Held += len(r.Held)
		run.Recomputed += stage
		if r.Filed {
			run.Logged += r.Stage
			res.Logged += r.Stage
			res.MaxDiff = max(res.MaxDiff, math.Abs(stage-r.Stage))
		} else {
			run.Unfiled++
		}
	}
	res.Rounds = len(res.rounds)
	return res, nil
}

// recompute is a round's stage cost: the logged state advanced under the
// controls carried out (the decided ones where no report came).
func recompute(m model.Fleet, l hub.Line) (float64, error) {
	if l.Snapshot == nil {
		return 0, errors.New("no state in the record")
	}
	x := m.NewState()
	if err := m.Unflatten(x, l.Snapshot.Ints, l.Snapshot.Reals); err != nil {
		return 0, fmt.Errorf("state: %w", err)
	}
	u := l.Applied
	if u == nil {
		u = l.Controls
	}
	if len(u) != m.Robots() {
		return 0, fmt.Errorf("%d controls for %d robots", len(u), m.Robots())
	}
	for r, c := range u {
		if c < 0 || c >= m.NumControls(x, r) {
			return 0, fmt.Errorf("robot %d: control %d out of range (0..%d)", r, c, m.NumControls(x, r)-1)
		}
	}
	return m.Advance(x, u), nil
}

func cmdReplay(args []string) error {
	fs := newFlags("replay", `Rebuilds an episode from a fleet's decision log and recomputes its cost:
from the durable JetStream stream the coordinator keeps (--nats), or from a
file (a coordinator's --decision-log, or an export made with --export).
It checks that the rounds run on with no gap and none twice across
coordinator restarts, recomputes every round's stage cost from the logged
state and controls, and compares it with the logged one.

  sim replay --file /tmp/baton-fleet-123/decisions-stream.jsonl
  sim replay --nats nats://nats-a:4222 --creds coordinator.nk --fleet yard \
             --scenario harbor --config site.yaml --export yard-log.jsonl --json`)
	var sc scenarioFlags
	sc.register(fs)
	file := fs.String("file", "", "read the log from this file (JSON lines) instead of a stream")
	var c shell.Common
	c.RegisterBus(fs, "", "read the fleet's durable log from this NATS server (URL list, comma-separated)",
		"NATS credentials file (the coordinator's, or any allowed to read the stream)")
	export := fs.String("export", "", "with --nats: also write every record as stored to this file (replay it later with --file)")
	asJSON := fs.Bool("json", false, "print the result as one JSON object")
	rounds := fs.Bool("rounds", false, "print every round (round, run, controls, held, stage cost)")
	viewAddr := fs.String("view", "", "serve the replay page (step, play, jump, speed) at this address, e.g. 127.0.0.1:7490, until Ctrl-C")
	htmlOut := fs.String("html", "", "write the replay page, with the whole log in it, to this one self-contained HTML file")
	if err := parse(fs, args); err != nil {
		return err
	}
	if (*file == "") == (c.NATS == "") {
		fmt.Fprintln(fs.Output(), "sim replay: give --file or --nats (one of them)")
		return errUsage
	}
	if *export != "" && c.NATS == "" {
		return errors.New("--export needs --nats: a file is already an export")
	}
	m0, err := sc.load()
	if err != nil {
		return err
	}
	m, ok := m0.(model.Fleet)
	if !ok {
		return fmt.Errorf("scenario %s cannot run as a fleet", m0.Name())
	}
	digest, err := sc.digest(m.Robots())
	if err != nil {
		return err
	}
	var lines []hub.Line
	source := *file
	if *file != "" {
		lines, err = readLogFile(*file)
	} else {
		source = "stream " + shell.JournalStream(c.Prefix, c.Fleet) + " at " + c.NATS
		lines, err = replayFromStream(c, *export)
	}
	if err != nil {
		return err
	}
	res, err := assemble(lines, m, digest)
	if err != nil {
		return err
	}
	res.Source = source
	if *asJSON {
		enc := json.NewEncoder(os.Stdout)
		enc.SetIndent("", "  ")
		if err := enc.Encode(res); err != nil {
			return err
		}
	} else {
		printReplay(os.Stdout, res, *rounds)
	}
	if *htmlOut != "" || *viewAddr != "" {
		site, frames, err := replayFrames(res, c.Fleet, m)
		if err != nil {
			return err
		}
		if *htmlOut != "" {
			if err := writeReplayHTML(*htmlOut, site, frames); err != nil {
				return err
			}
			fmt.Fprintf(os.Stderr, "replay page: %s (%d rounds)\n", *htmlOut, len(frames))
		}
		if *viewAddr != "" {
			return serveReplay(*viewAddr, site, frames)
		}
	}
	if !res.Continuous() {
		return fmt.Errorf("the log is not continuous: %s", res.Summary())
	}
	return nil
}

// replaySummary is what the replay page shows beside the map.
type replaySummary struct {
	Source   string      `json:"source"`
	Rounds   int         `json:"rounds"`
	First    uint64      `json:"first_round"`
	Last     uint64      `json:"last_round"`
	Runs     []replayRun `json:"runs"`
	Cost     float64     `json:"cost"`
	Logged   float64     `json:"logged_cost"`
	CostKind string      `json:"cost_kind"`
	Log      string      `json:"log"`
}

// replayFrames draws every round of a replayed log.
func replayFrames(res replayResult, fleet string, m model.Fleet) (view.Site, []view.Frame, error) {
	site, err := view.NewSite(fleet, m)
	if err != nil {
		return site, nil, err
	}
	site.Mode, site.Source = "replay", res.Source
	site.Summary = replaySummary{Source: res.Source, Rounds: res.Rounds, First: res.First, Last: res.Last, Runs: res.Runs,
		Cost: res.Cost, Logged: res.Logged, CostKind: res.StageKind, Log: res.Summary()}
	frames := make([]view.Frame, 0, len(res.rounds))
	for _, r := range res.rounds {
		rec := r.Record
		if !r.Filed {
			rec.Stage = r.Recomputed
		}
		f, err := view.FrameOf(m, rec)
		if err != nil {
			return site, nil, err
		}
		frames = append(frames, f)
	}
	return site, frames, nil
}

func writeReplayHTML(path string, site view.Site, frames []view.Frame) error {
	f, err := os.Create(path)
	if err != nil {
		return fmt.Errorf("--html: %w", err)
	}
	bw := bufio.NewWriter(f)
	err = view.WriteHTML(bw, site, frames)
	if ferr := bw.Flush(); err == nil {
		err = ferr
	}
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	if err != nil {
		os.Remove(path)
		return fmt.Errorf("--html %s: %w", path, err)
	}
	return nil
}

// serveReplay serves the replay page until Ctrl-C.
func serveReplay(addr string, site view.Site, frames []view.Frame) error {
	h, err := view.Replay(site, frames)
	if err != nil {
		return err
	}
	ln, err := net.Listen("tcp", addr)
	if err != nil {
		return fmt.Errorf("--view %s: %w", addr, err)
	}
	srv := &http.Server{Handler: h, ReadHeaderTimeout: 5 * time.Second}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	go func() {
		<-ctx.Done()
		srv.Close()
	}()
	fmt.Printf("replay view: http://%s/view  (Ctrl-C to stop)\n", ln.Addr())
	if err := srv.Serve(ln); err != nil && !errors.Is(err, http.ErrServerClosed) {
		return err
	}
	return nil
}

func replayFromStream(c shell.Common, export string) ([]hub.Line, error) {
	tlsOpts, err := c.TLSOptions()
	if err != nil {
		return nil, err
	}
	nc, err := shell.Connect(c.NATS, c.Creds, "sim-replay", 10*time.Second, zap.NewNop(), tlsOpts...)
	if err != nil {
		return nil, err
	}
	defer nc.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	var raw io.Writer
	var out *os.File
	if export != "" {
		if out, err = os.Create(export); err != nil {
			return nil, fmt.Errorf("--export: %w", err)
		}
		defer out.Close()
		bw := bufio.NewWriter(out)
		defer bw.Flush()
		raw = bw
	}
	return readLogStream(ctx, nc, c.Prefix, c.Fleet, raw)
}

func printReplay(w io.Writer, res replayResult, rounds bool) {
	fmt.Fprintf(w, "decision log: %s\n", res.Source)
	fmt.Fprintf(w, "scenario %s, %d robots, digest %s\n\n", res.Scenario, res.Robots, res.Digest)
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "run (epoch)\trounds\tcount\tclosed, not filed\trobot-rounds held\tlogged stage cost\trecomputed\t")
	for _, r := range res.Runs {
		fmt.Fprintf(tw, "%d\t%d-%d\t%d\t%d\t%d\t%.4f\t%.4f\t\n", r.Epoch, r.First, r.Last, r.Rounds, r.Unfiled, r.Held, r.Logged, r.Recomputed)
	}
	tw.Flush()
	if rounds {
		fmt.Fprintln(w)
		tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
		fmt.Fprintln(tw, "round\trun\tcontrols\theld\tstage cost\tfiled")
		for _, r := range res.rounds {
			fmt.Fprintf(tw, "%d\t%d\t%s\t%v\t%.4f\t%v\n", r.Round, r.Epoch, strings.Trim(fmt.Sprint(r.Controls), "[]"), r.Held, r.Recomputed, r.Filed)
		}
		tw.Flush()
	}
	fmt.Fprintf(w, "\n%s\n", res.Summary())
	fmt.Fprintf(w, "cost recomputed from the log: %.4f over %d rounds (logged stage costs of filed rounds: %.4f; largest difference on one round %.3g)\n",
		res.Cost, res.Rounds, res.Logged, res.MaxDiff)
	if res.Interrupt > 0 {
		fmt.Fprintf(w, "%d record(s) of rounds interrupted mid-round (played again by the next run) are not counted\n", res.Interrupt)
	}
	fmt.Fprintf(w, "stage costs are the coordinator's (%s)\n", res.StageKind)
}
