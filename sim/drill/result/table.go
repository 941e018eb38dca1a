package result

import (
	"bytes"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"text/tabwriter"
)

// columns heads the per-config table, on the terminal and in HTML.
var columns = []string{
	"name", "mode", "guess", "loss", "burst", "mean cost ± ci95", "retained ± ci95",
	"guessed %", "held", "p50 ms", "p99 ms", "dropped/dup/late", "false dead",
}

// Table writes the report as plain text: a few header lines, then one
// row per config.
func (r *Report) Table(w io.Writer) error {
	var b bytes.Buffer
	for _, line := range r.headerLines() {
		b.WriteString(line)
		b.WriteByte('\n')
	}
	b.WriteByte('\n')
	tw := tabwriter.NewWriter(&b, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, strings.Join(columns, "\t"))
	if len(r.Configs) == 0 {
		fmt.Fprintln(tw, "(no configurations)")
	}
	for _, row := range r.rows() {
		fmt.Fprintln(tw, strings.Join(row, "\t"))
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	_, err := w.Write(b.Bytes())
	return err
}

// fact is one header figure: a label and its formatted value.
type fact struct{ Label, Value string }

func (r *Report) facts() []fact {
	f := []fact{
		{"drill", r.Drill},
		{"scenario", r.Scenario},
		{"robots", strconv.Itoa(r.Robots)},
		{"rounds", strconv.Itoa(r.Rounds)},
		{"episodes", strconv.Itoa(r.Episodes)},
		{"seed", strconv.FormatUint(r.Seed, 10)},
		{"base cost", pm(r.BaseCost, r.BaseCI95, 2)},
		{"sequential cost", pm(r.SequentialCost, r.SequentialCI95, 2)},
		{"wall", num(r.WallSeconds, 1) + " s"},
	}
	// The rest only says something when the drill did it.
	if r.VirtualSeconds > 0 {
		f = append(f, fact{"virtual", num(r.VirtualSeconds, 1) + " s"})
	}
	if r.ProcessConfigs > 0 {
		f = append(f, fact{"process configs", strconv.Itoa(r.ProcessConfigs)})
	}
	if r.GossipSecondsSpent > 0 {
		f = append(f, fact{"gossip", num(r.GossipSecondsSpent, 1) + " s"})
	}
	return f
}

func (r *Report) headerLines() []string {
	f := r.facts()
	join := func(fs []fact) string {
		parts := make([]string, len(fs))
		for i, x := range fs {
			parts[i] = x.Label + ": " + x.Value
		}
		return strings.Join(parts, "   ")
	}
	// drill+scenario, the sizes, the two references, the times.
	return []string{join(f[0:2]), join(f[2:6]), join(f[6:8]), join(f[8:])}
}

// rows formats each config's cells in the order of columns.
func (r *Report) rows() [][]string {
	out := make([][]string, len(r.Configs))
	for i, c := range r.Configs {
		falseDead := "-"
		if c.FalseDead >= 0 {
			falseDead = strconv.Itoa(c.FalseDead)
		}
		out[i] = []string{
			c.Name, c.Mode, c.Guess,
			num(c.Loss, -1), num(c.Burst, -1),
			pm(c.MeanCost, c.CI95, 2),
			pm(c.Retained, c.RetainedCI95, 3),
			num(100*c.GuessedShare, 1),
			strconv.Itoa(c.HeldRounds),
			num(c.LatencyP50Ms, 1), num(c.LatencyP99Ms, 1),
			fmt.Sprintf("%d/%d/%d", c.Dropped, c.Duplicated, c.Late),
			falseDead,
		}
	}
	return out
}

// num formats v with prec decimals (-1: as few as exact); NaN, which a
// drill uses for "undefined", reads "n/a".
func num(v float64, prec int) string {
	switch {
	case math.IsNaN(v):
		return "n/a"
	case math.IsInf(v, 1):
		return "inf"
	case math.IsInf(v, -1):
		return "-inf"
	}
	return strconv.FormatFloat(v, 'f', prec, 64)
}

// pm formats a mean with the half-width of its interval.
func pm(v, ci float64, prec int) string {
	if math.IsNaN(v) {
		return "n/a"
	}
	return num(v, prec) + " ± " + num(ci, prec)
}
