// Package compare runs base, all-at-once and one-at-a-time rollout on the
// same seeded episodes and summarises their cost and effort.
package compare

import (
	"fmt"
	"io"
	"math"
	"strings"
	"time"

	"baton/agentd/decide"
	"baton/sim/assign"
	"baton/sim/episode"
	"baton/sim/model"
)

// Policy names, as printed and as accepted by Options.Policies.
const (
	Base      = "base"
	AllAtOnce = "all-at-once"
	OneAtTime = "one-at-a-time"
	// Assignment is the per-step optimal assignment of robots to targets
	// (sim/assign); OneOnAssign is one-at-a-time rollout with it as the
	// base policy.
	Assignment  = "assignment"
	OneOnAssign = "one-at-a-time+assignment"
)

// Options of a comparison.
type Options struct {
	Episodes int
	Seed     uint64
	Decide   decide.Config
	// MaxJoint is the largest n^m for which all-at-once is run.
	MaxJoint int
	// Policies to run (default all three).
	Policies []string
	// Order of one-at-a-time turns (nil: 0..m-1).
	Order []int
	// Now times decisions; nil leaves ms_per_decision at 0.
	Now func() time.Time
	// Progress, if set, is called after each episode of each policy.
	Progress func(done, total int)
}

// Row is one policy's summary.
type Row struct {
	Name          string    `json:"name"`
	MeanCost      float64   `json:"mean_cost"`
	CI95          float64   `json:"ci95"`
	MeanSteps     float64   `json:"mean_steps"`
	QPerDecision  float64   `json:"qfactors_per_decision"`
	MsPerDecision float64   `json:"ms_per_decision"`
	Costs         []float64 `json:"-"`
}

// Report is the whole comparison.
type Report struct {
	Scenario string   `json:"scenario"`
	Robots   int      `json:"robots"`
	Episodes int      `json:"episodes"`
	Seed     uint64   `json:"seed"`
	Samples  int      `json:"samples"`
	Horizon  int      `json:"rollout_horizon"`
	Policies []Row    `json:"policies"`
	Skipped  []string `json:"skipped,omitempty"`
	// CostKind says what mean_cost is.
	CostKind string `json:"cost_kind"`
}

// CostKind is what an episode's cost is in a comparison of m.
func CostKind(m model.Model) string {
	sum := "sum of stage costs per episode (no discount)"
	if d := m.Discount(); d < 1 {
		sum = fmt.Sprintf("discounted sum of stage costs per episode (factor %g)", d)
	}
	return fmt.Sprintf("%s, %s; mean over episodes", sum, model.StageKind(m))
}

// Run plays every policy on episodes 0..Episodes-1 of the run seed.
func Run(m model.Model, o Options) (*Report, error) {
	if o.Episodes < 1 {
		return nil, fmt.Errorf("--episodes must be at least 1, got %d", o.Episodes)
	}
	if len(o.Policies) == 0 {
		o.Policies = []string{Base, AllAtOnce, OneAtTime}
	}
	if o.MaxJoint <= 0 {
		o.MaxJoint = 1000
	}
	if err := checkOrder(o.Order, m.Robots()); err != nil {
		return nil, err
	}
	d := decide.New(m, o.Decide)
	var assigned model.Model // m with the assignment policy as its base, when asked for
	var da *decide.Decider
	rep := &Report{Scenario: m.Name(), Robots: m.Robots(), Episodes: o.Episodes, Seed: o.Seed, CostKind: CostKind(m),
		Samples: d.Config().Samples, Horizon: d.Config().Horizon}
	var run []string
	for _, name := range o.Policies {
		switch name {
		case Base, OneAtTime:
		case Assignment, OneOnAssign:
			if assigned == nil {
				a, err := assign.Wrap(m)
				if err != nil {
					return nil, err
				}
				assigned, da = a, decide.New(a, o.Decide)
			}
		case AllAtOnce:
			joint := math.Pow(float64(m.MaxControls()), float64(m.Robots()))
			if joint > float64(o.MaxJoint) {
				rep.Skipped = append(rep.Skipped, fmt.Sprintf(
					"all-at-once skipped: up to %d^%d = %.4g joint controls per decision, over --max-joint %d",
					m.MaxControls(), m.Robots(), joint, o.MaxJoint))
				continue
			}
		default:
			return nil, fmt.Errorf("unknown policy %q (known: %s, %s, %s, %s, %s)", name, Base, AllAtOnce, OneAtTime, Assignment, OneOnAssign)
		}
		run = append(run, name)
	}
	total, done := len(run)*o.Episodes, 0
	for _, name := range run {
		var p decide.Policy
		row := Row{Name: name}
		var steps, decisions, qf int
		var compute time.Duration
		for i := range o.Episodes {
			seed := episode.Seed(o.Seed, i)
			fleet := episode.FleetSeed(seed)
			switch name {
			case Base:
				p = decide.Base{M: m}
			case AllAtOnce:
				p = decide.AllAtOncePolicy{D: d, Seed: fleet}
			case OneAtTime:
				p = decide.OneAtATimePolicy{D: d, Order: o.Order, Seed: fleet}
			case Assignment:
				p = decide.Base{M: assigned}
			case OneOnAssign:
				p = decide.OneAtATimePolicy{D: da, Order: o.Order, Seed: fleet}
			}
			res, err := episode.Run(m, p, seed, o.Now)
			if err != nil {
				return nil, fmt.Errorf("%s, episode %d: %w", name, i, err)
			}
			row.Costs = append(row.Costs, res.Cost)
			steps += res.Steps
			decisions += res.Decisions
			qf += res.QFactors
			compute += res.Compute
			done++
			if o.Progress != nil {
				o.Progress(done, total)
			}
		}
		row.MeanCost, row.CI95 = episode.MeanCI95(row.Costs)
		row.MeanSteps = float64(steps) / float64(o.Episodes)
		if decisions > 0 {
			row.QPerDecision = float64(qf) / float64(decisions)
			row.MsPerDecision = compute.Seconds() * 1000 / float64(decisions)
		}
		rep.Policies = append(rep.Policies, row)
	}
	return rep, nil
}

func checkOrder(order []int, m int) error {
	if order == nil {
		return nil
	}
	if len(order) != m {
		return fmt.Errorf("--order lists %d robots, the fleet has %d", len(order), m)
	}
	seen := make([]bool, m)
	for _, r := range order {
		if r < 0 || r >= m || seen[r] {
			return fmt.Errorf("--order must be a permutation of 0..%d, got %v", m-1, order)
		}
		seen[r] = true
	}
	return nil
}

// Row returns the named policy's row, or nil.
func (r *Report) Row(name string) *Row {
	for i := range r.Policies {
		if r.Policies[i].Name == name {
			return &r.Policies[i]
		}
	}
	return nil
}

// WriteTable prints the report for people.
func (r *Report) WriteTable(w io.Writer) {
	fmt.Fprintf(w, "%s, %d robots, %d episodes, seed %d, %d samples per Q-factor, rollout horizon %d\n\n",
		r.Scenario, r.Robots, r.Episodes, r.Seed, r.Samples, r.Horizon)
	wn := len("policy")
	for _, p := range r.Policies {
		wn = max(wn, len(p.Name))
	}
	fmt.Fprintf(w, "%-*s %11s %9s %11s %13s %12s\n", wn, "policy", "mean cost", "95% CI", "mean steps", "Q/decision", "ms/decision")
	fmt.Fprintln(w, strings.Repeat("-", wn+61))
	for _, p := range r.Policies {
		fmt.Fprintf(w, "%-*s %11.2f %9s %11.1f %13.0f %12.2f\n", wn, p.Name, p.MeanCost, fmt.Sprintf("±%.2f", p.CI95), p.MeanSteps, p.QPerDecision, p.MsPerDecision)
	}
	for _, s := range r.Skipped {
		fmt.Fprintln(w, s)
	}
	fmt.Fprintf(w, "\ncost: %s\n", r.CostKind)
}
