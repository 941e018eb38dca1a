package compare

import (
	"math"
	"strings"
	"testing"

	"baton/agentd/decide"
	"baton/sim/episode"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// A small seeded version of the harbor comparison the README reports: both
// rollouts beat base clearly (confidence intervals apart) and one-at-a-time
// stays within 10% of all-at-once, judged on paired episode differences.
func TestHarborRolloutBeatsBase(t *testing.T) {
	m, err := harbor.Default(3)
	if err != nil {
		t.Fatal(err)
	}
	rep, err := Run(m, Options{Episodes: 12, Seed: 3, Decide: decide.Config{Samples: 8, Horizon: 15}})
	if err != nil {
		t.Fatal(err)
	}
	b, all, one := rep.Row(Base), rep.Row(AllAtOnce), rep.Row(OneAtTime)
	if b == nil || all == nil || one == nil {
		t.Fatalf("missing rows: %+v", rep.Policies)
	}
	for _, r := range []*Row{all, one} {
		if r.MeanCost+r.CI95 >= b.MeanCost-b.CI95 {
			t.Errorf("%s %.1f±%.1f not clearly below base %.1f±%.1f", r.Name, r.MeanCost, r.CI95, b.MeanCost, b.CI95)
		}
	}
	diff := make([]float64, len(one.Costs))
	for i := range diff {
		diff[i] = one.Costs[i] - 1.10*all.Costs[i]
	}
	mean, half := episode.MeanCI95(diff)
	if mean-half > 0 {
		t.Errorf("one-at-a-time %.1f is more than 10%% above all-at-once %.1f (paired diff %.2f±%.2f)", one.MeanCost, all.MeanCost, mean, half)
	}
	if one.QPerDecision != 15 || all.QPerDecision != 125 {
		t.Errorf("Q-factors per decision %g and %g, want 15 and 125", one.QPerDecision, all.QPerDecision)
	}
}

// All-at-once is skipped with a reason when n^m is out of reach, and
// one-at-a-time still decides and beats base.
func TestLargeFleetSkipsAllAtOnce(t *testing.T) {
	m, err := harbor.Default(12)
	if err != nil {
		t.Fatal(err)
	}
	rep, err := Run(m, Options{Episodes: 6, Seed: 1, Decide: decide.Config{Samples: 6, Horizon: 10}})
	if err != nil {
		t.Fatal(err)
	}
	if rep.Row(AllAtOnce) != nil || len(rep.Skipped) != 1 || !strings.Contains(rep.Skipped[0], "5^12") {
		t.Fatalf("all-at-once should be skipped: %+v", rep)
	}
	if one, b := rep.Row(OneAtTime), rep.Row(Base); one.MeanCost >= b.MeanCost {
		t.Errorf("one-at-a-time %.1f does not beat base %.1f", one.MeanCost, b.MeanCost)
	}
}

func TestUpkeepRolloutBeatsBase(t *testing.T) {
	m, err := upkeep.Default(3)
	if err != nil {
		t.Fatal(err)
	}
	rep, err := Run(m, Options{Episodes: 8, Seed: 2, Policies: []string{Base, OneAtTime},
		Decide: decide.Config{Samples: 6, Horizon: 10}})
	if err != nil {
		t.Fatal(err)
	}
	one, b := rep.Row(OneAtTime), rep.Row(Base)
	if one.MeanCost >= b.MeanCost {
		t.Errorf("one-at-a-time %.1f does not beat base %.1f", one.MeanCost, b.MeanCost)
	}
}

func TestBadOptions(t *testing.T) {
	m, _ := harbor.Default(2)
	cases := []struct {
		o    Options
		want string
	}{
		{Options{Episodes: 0}, "--episodes must be at least 1"},
		{Options{Episodes: 1, Policies: []string{"greedy"}}, `unknown policy "greedy"`},
		{Options{Episodes: 1, Order: []int{0}}, "--order lists 1 robots, the fleet has 2"},
		{Options{Episodes: 1, Order: []int{1, 1}}, "--order must be a permutation of 0..1"},
	}
	for _, c := range cases {
		if _, err := Run(m, c.o); err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("err = %v, want %q", err, c.want)
		}
	}
}

// The same seed replays the same costs.
func TestReplay(t *testing.T) {
	m, _ := harbor.Default(3)
	o := Options{Episodes: 3, Seed: 9, Policies: []string{OneAtTime}, Decide: decide.Config{Samples: 4, Horizon: 8}}
	a, _ := Run(m, o)
	b, _ := Run(m, o)
	for i, c := range a.Policies[0].Costs {
		if b.Policies[0].Costs[i] != c {
			t.Fatal("same seed, different costs")
		}
	}
}

// The auction baselines run in a comparison with their effort counted: the
// auction's bidding rounds and messages per decision (one per robot per
// neighbour per round, all hearing all: 3 x 2 per round), rollout's m(m-1)
// decision messages, none for the assignment; the table names the columns.
func TestAuctionInComparison(t *testing.T) {
	hm, err := harbor.Default(3)
	if err != nil {
		t.Fatal(err)
	}
	um, err := upkeep.Default(3)
	if err != nil {
		t.Fatal(err)
	}
	for _, m := range []model.Model{hm, um} {
		rep, err := Run(m, Options{Episodes: 2, Seed: 3, Decide: decide.Config{Samples: 4, Horizon: 5},
			Policies: []string{Assignment, Auction, OneOnAuction}})
		if err != nil {
			t.Fatal(err)
		}
		a, oa, as := rep.Row(Auction), rep.Row(OneOnAuction), rep.Row(Assignment)
		if a == nil || oa == nil || as == nil {
			t.Fatalf("%s: rows missing", rep.Scenario)
		}
		if a.BiddingRounds == nil || a.SettledRound == nil || *a.BiddingRounds <= 0 || *a.SettledRound > *a.BiddingRounds ||
			math.Abs(a.MessagesPerDecision-6**a.BiddingRounds) > 1e-9 || a.Unsettled == nil || *a.Unsettled != 0 {
			t.Fatalf("%s: auction row %+v", rep.Scenario, a)
		}
		if oa.MessagesPerDecision != 6 || as.MessagesPerDecision != 0 || oa.BiddingRounds != nil || oa.Unsettled == nil || as.Unsettled != nil {
			t.Fatalf("%s: rollout on the auction %+v, assignment %+v", rep.Scenario, oa, as)
		}
		if rep.Auction == nil || rep.Auction.Lambda != 0.9 || rep.Auction.Bundle != 2 || rep.Auction.Range != 0 {
			t.Fatalf("%s: auction settings %+v", rep.Scenario, rep.Auction)
		}
		var b strings.Builder
		rep.WriteTable(&b)
		for _, col := range []string{"msgs/dec", "bid rounds/dec", "one-at-a-time+auction", "auction: a target's worth x0.9"} {
			if !strings.Contains(b.String(), col) {
				t.Fatalf("table lacks %q:\n%s", col, b.String())
			}
		}
	}
}

// A policy list with an empty name or a name twice is refused, naming it.
func TestPolicyListErrors(t *testing.T) {
	m, err := harbor.Default(2)
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		list []string
		want string
	}{
		{[]string{""}, "empty name"},
		{[]string{Auction, Auction}, "auction listed twice"},
		{[]string{Base, "nope"}, `unknown policy "nope"`},
	} {
		_, err := Run(m, Options{Episodes: 1, Policies: c.list})
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%q: err %v, want %q", c.list, err, c.want)
		}
	}
}
