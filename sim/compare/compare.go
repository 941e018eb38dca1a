// Package compare runs policies (base, all-at-once and one-at-a-time
// rollout, the assignment and auction baselines, rollout on either) on the
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
	"baton/sim/auction"
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
	// Auction is a consensus-based bundle auction among the robots at
	// every step (sim/auction); OneOnAuction is rollout on it.
	Auction      = "auction"
	OneOnAuction = "one-at-a-time+auction"
)

// known lists every policy name, for errors and help.
var known = []string{Base, AllAtOnce, OneAtTime, Assignment, OneOnAssign, Auction, OneOnAuction}

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
	// Auction configures the auction policies (zero: sim/auction's defaults).
	Auction auction.Config
}

// Row is one policy's summary.
type Row struct {
	Name          string  `json:"name"`
	MeanCost      float64 `json:"mean_cost"`
	CI95          float64 `json:"ci95"`
	MeanSteps     float64 `json:"mean_steps"`
	QPerDecision  float64 `json:"qfactors_per_decision"`
	MsPerDecision float64 `json:"ms_per_decision"`
	// MessagesPerDecision counts messages between robots per joint
	// decision as a fleet would exchange them: none for a policy every
	// robot computes alike from the shared state (base, assignment) or one
	// process decides whole (all-at-once), each robot's decision to every
	// other for one-at-a-time rollout (m(m-1)), and one per robot per
	// neighbour per bidding round for the auction.
	MessagesPerDecision float64 `json:"messages_per_decision"`
	// The auction's row only. BiddingRounds is its rounds of bidding per
	// decision, counting the rounds that confirm nothing changes any more
	// and 0 for a step with nothing to bid for; SettledRound is the round
	// of the last change, averaged the same way.
	BiddingRounds *float64 `json:"bidding_rounds_per_decision,omitempty"`
	SettledRound  *float64 `json:"settled_round_per_decision,omitempty"`
	// Auction rows (the auction, and rollout on it, whose base policy runs
	// an auction at every simulated step): auctions that met their round
	// cap (the robots followed their paths as they stood) and that could not
	// run (the scenario's own base policy decided).
	Unsettled *int64    `json:"auctions_unsettled,omitempty"`
	Failed    *int64    `json:"auctions_failed,omitempty"`
	Costs     []float64 `json:"-"`
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
	// Auction is the auction's settings, when an auction policy ran.
	Auction *AuctionSettings `json:"auction,omitempty"`
}

// AuctionSettings are the auction's, as a report records them (Range 0:
// every robot hears every other).
type AuctionSettings struct {
	Lambda float64 `json:"lambda"`
	Bundle int     `json:"bundle"`
	Range  int     `json:"range"`
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
	var auctioned *auction.Policy // the auction policy, its model the base of rollout on it
	var dq *decide.Decider
	rep := &Report{Scenario: m.Name(), Robots: m.Robots(), Episodes: o.Episodes, Seed: o.Seed, CostKind: CostKind(m),
		Samples: d.Config().Samples, Horizon: d.Config().Horizon}
	var run []string
	seen := map[string]bool{}
	for _, name := range o.Policies {
		if name == "" {
			return nil, fmt.Errorf("--policies: an empty name in the list (known: %s)", strings.Join(known, ", "))
		}
		if seen[name] {
			return nil, fmt.Errorf("--policies: %s listed twice", name)
		}
		seen[name] = true
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
		case Auction, OneOnAuction:
			if auctioned == nil {
				a, err := auction.NewPolicy(m, o.Auction)
				if err != nil {
					return nil, err
				}
				auctioned, dq = a, decide.New(a.Model(), o.Decide)
				c := a.Config()
				rep.Auction = &AuctionSettings{Lambda: c.Lambda, Bundle: c.Bundle, Range: c.Range}
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
			return nil, fmt.Errorf("unknown policy %q (known: %s)", name, strings.Join(known, ", "))
		}
		run = append(run, name)
	}
	total, done := len(run)*o.Episodes, 0
	for _, name := range run {
		var p decide.Policy
		row := Row{Name: name}
		var steps, decisions, qf int
		var compute time.Duration
		var unsettled0, failed0 int64
		if auctioned != nil {
			auctioned.Counts = auction.Counts{}
			unsettled0, failed0, _ = auction.Troubles(auctioned.Model())
		}
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
			case Auction:
				p = auctioned
			case OneOnAuction:
				p = decide.OneAtATimePolicy{D: dq, Order: o.Order, Seed: fleet}
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
			switch name {
			case OneAtTime, OneOnAssign, OneOnAuction:
				row.MessagesPerDecision = float64(m.Robots() * (m.Robots() - 1))
			case Auction:
				n := float64(auctioned.Decisions)
				row.MessagesPerDecision = float64(auctioned.Messages) / n
				rounds, settled := float64(auctioned.Rounds)/n, float64(auctioned.Settled)/n
				unsettled, failed := int64(auctioned.Unsettled), int64(auctioned.Failed)
				row.BiddingRounds, row.SettledRound, row.Unsettled, row.Failed = &rounds, &settled, &unsettled, &failed
			}
			if name == OneOnAuction {
				u, f, _ := auction.Troubles(auctioned.Model())
				u, f = u-unsettled0, f-failed0
				row.Unsettled, row.Failed = &u, &f
			}
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
	fmt.Fprintf(w, "%-*s %11s %9s %11s %11s %12s %10s %14s\n", wn, "policy", "mean cost", "95% CI", "mean steps",
		"Q/decision", "ms/decision", "msgs/dec", "bid rounds/dec")
	fmt.Fprintln(w, strings.Repeat("-", wn+86))
	for _, p := range r.Policies {
		rounds := "-"
		if p.BiddingRounds != nil {
			rounds = fmt.Sprintf("%.2f", *p.BiddingRounds)
		}
		ci := fmt.Sprintf("±%.2f", p.CI95)
		if r.Episodes < 2 {
			ci = "-" // one episode has no interval
		}
		fmt.Fprintf(w, "%-*s %11.2f %9s %11.1f %11.0f %12.3f %10.1f %14s\n", wn, p.Name, p.MeanCost, ci,
			p.MeanSteps, p.QPerDecision, p.MsPerDecision, p.MessagesPerDecision, rounds)
	}
	for _, p := range r.Policies {
		if p.Unsettled != nil && *p.Unsettled > 0 {
			fmt.Fprintf(w, "%s: %d auctions did not settle within their round cap (the robots followed their paths as they stood)\n", p.Name, *p.Unsettled)
		}
		if p.Failed != nil && *p.Failed > 0 {
			fmt.Fprintf(w, "%s: %d auctions could not run (the scenario's own base policy decided)\n", p.Name, *p.Failed)
		}
	}
	for _, s := range r.Skipped {
		fmt.Fprintln(w, s)
	}
	if a := r.Auction; a != nil {
		hear := "every robot hears every other"
		if a.Range > 0 {
			hear = fmt.Sprintf("robots hear those within %d", a.Range)
		}
		fmt.Fprintf(w, "\nauction: a target's worth x%g per step of travel, at most %d targets per robot, %s\n", a.Lambda, a.Bundle, hear)
	}
	fmt.Fprintf(w, "\nmsgs/dec: messages between robots per decision (rollout: each robot's decision to every other;\n"+
		"auction: one per robot per neighbour per bidding round); bid rounds/dec counts the rounds that confirm the result\n")
	fmt.Fprintf(w, "\ncost: %s\n", r.CostKind)
}
