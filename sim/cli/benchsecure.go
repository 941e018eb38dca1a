package cli

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"os/signal"
	"syscall"
	"text/tabwriter"
	"time"

	"baton/coordinator/clock"
	"baton/sim/fleetsum"
)

// secureRow is one configuration's rounds in `sim bench security`.
type secureRow struct {
	Config string  `json:"config"`
	Rounds int     `json:"rounds"`
	P50Ms  float64 `json:"round_latency_p50_ms"`
	P99Ms  float64 `json:"round_latency_p99_ms"`
	MeanMs float64 `json:"round_latency_mean_ms"`
	Held   int     `json:"robot_rounds_held"`
}

// cmdBenchSecurity measures what security costs a round: two process
// fleets of the same scenario and seed, one plain and one with an nkey and
// permissions per process and TLS, played in alternating blocks of rounds
// in one run (so both see the same machine load), compared by round
// latency.
func cmdBenchSecurity(args []string) error {
	fs := newFlags("bench security", `Measures the round latency a fleet pays for security: two fleets of real
processes (embedded NATS, coordinator, one agentd per robot), one plain and one
--secure (an nkey and publish permissions per process, TLS to the server),
played in alternating blocks of rounds in one run, so both see the same machine
load. Round latency is the coordinator's: from the round start to the last
decision.`)
	var sc scenarioFlags
	sc.register(fs)
	rounds := fs.Int("rounds", 300, "rounds per fleet")
	block := fs.Int("block", 25, "rounds played by one fleet before the other's turn")
	seed := fs.Uint64("seed", 1, "run seed (the same for both fleets)")
	asJSON := fs.Bool("json", false, "print one JSON object")
	if err := parse(fs, args); err != nil {
		return err
	}
	if *rounds < 1 || *block < 1 || *rounds > 100000 {
		return fmt.Errorf("--rounds (1..100000) and --block must be at least 1")
	}
	exe, err := os.Executable()
	if err != nil {
		return err
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	type arm struct {
		name  string
		f     *fleetRun
		lat   []float64
		held  int
		next  int
		logTo string
	}
	var arms []*arm
	for _, secure := range []bool{false, true} {
		logDir, err := os.MkdirTemp("", "baton-bench-security-")
		if err != nil {
			return err
		}
		c := clock.DefaultConfig()
		c.Rounds = *rounds
		o := fleetOpts{sc: sc, clock: c, seed: *seed, fleet: "bench", prefix: "baton", logDir: logDir, slow: faults{},
			exe: exe, secure: secure}
		f, err := startFleet(ctx, o)
		if err != nil {
			return fmt.Errorf("starting the %s fleet (logs in %s): %w", map[bool]string{false: "plain", true: "secure"}[secure], logDir, err)
		}
		defer f.close()
		name := "plain (no credentials, no TLS)"
		if secure {
			name = "secure (nkey + permissions per process, TLS)"
		}
		arms = append(arms, &arm{name: name, f: f, next: 1, logTo: logDir})
	}
	for done := false; !done && ctx.Err() == nil; {
		done = true
		for _, a := range arms {
			for n := 0; n < *block && a.next <= *rounds && ctx.Err() == nil; n++ {
				r := a.f.play(a.next)
				a.lat = append(a.lat, float64(r.LatencyUs)/1000)
				a.held += r.Held
				a.next++
			}
			done = done && a.next > *rounds
		}
	}
	if err := ctx.Err(); err != nil {
		return fmt.Errorf("%w", errInterrupted)
	}
	var rows []secureRow
	for _, a := range arms {
		mean := 0.0
		for _, v := range a.lat {
			mean += v / float64(len(a.lat))
		}
		rows = append(rows, secureRow{Config: a.name, Rounds: len(a.lat), P50Ms: fleetsum.Quantile(a.lat, 0.5),
			P99Ms: fleetsum.Quantile(a.lat, 0.99), MeanMs: mean, Held: a.held})
	}
	ratio := rows[1].P50Ms / rows[0].P50Ms
	if *asJSON {
		enc := json.NewEncoder(os.Stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(map[string]any{"scenario": sc.name, "robots": arms[0].f.m.Robots(), "block": *block,
			"rows": rows, "p50_ratio_secure_to_plain": ratio})
	}
	fmt.Printf("%s, %d robots, %d rounds per fleet in blocks of %d, %s\n\n", arms[0].f.m.Name(), arms[0].f.m.Robots(), *rounds, *block,
		time.Now().Format(time.DateOnly))
	tw := tabwriter.NewWriter(os.Stdout, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "fleet\trounds\tp50 ms\tp99 ms\tmean ms\trobot-rounds held")
	for _, r := range rows {
		fmt.Fprintf(tw, "%s\t%d\t%.2f\t%.2f\t%.2f\t%d\n", r.Config, r.Rounds, r.P50Ms, r.P99Ms, r.MeanMs, r.Held)
	}
	tw.Flush()
	fmt.Printf("\nround latency p50, secure / plain: %.2f\n", ratio)
	return nil
}
