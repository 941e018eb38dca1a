package auction

import (
	"fmt"
	"strings"
	"testing"

	"baton/agentd/decide"
	"baton/sim/exact"
	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

var _ decide.Policy = (*Policy)(nil)

func tinies() []struct {
	name string
	tiny func(uint64) model.Model
} {
	return []struct {
		name string
		tiny func(uint64) model.Model
	}{
		{"harbor", func(s uint64) model.Model { return harbor.RandomTiny(s) }},
		{"upkeep", func(s uint64) model.Model { return upkeep.RandomTiny(s) }},
	}
}

// Rollout improves on the auction as on any base policy (Bertsekas,
// "Multiagent rollout algorithms and reinforcement learning",
// arXiv:1910.00120: the cost improvement property): on exact tiny
// instances, one-at-a-time rollout with the auction as its base costs no
// more than the auction at any state, and the auction itself is a valid
// policy (exactly evaluated). As sim/assign's TestRolloutOnAssignmentImproves.
func TestRolloutOnAuctionImproves(t *testing.T) {
	for _, sc := range tinies() {
		for seed := uint64(1); seed <= 10; seed++ {
			t.Run(fmt.Sprintf("%s/seed=%d", sc.name, seed), func(t *testing.T) {
				m := sc.tiny(seed)
				a, err := Wrap(m, Config{})
				if err != nil {
					t.Fatal(err)
				}
				if err := exact.RolloutOnBaseNoWorse(a, seed, 20000); err != nil {
					t.Fatal(err)
				}
			})
		}
	}
}

func TestWrapUnknownScenario(t *testing.T) {
	_, err := Wrap(fakeModel{}, Config{})
	if err == nil || !strings.Contains(err.Error(), "orchard") {
		t.Fatalf("err %v, want one naming the scenario orchard", err)
	}
	if _, err := NewPolicy(fakeModel{}, Config{}); err == nil {
		t.Fatal("a policy for a scenario without targets")
	}
}

type fakeModel struct{ model.Model }

func (fakeModel) Name() string { return "orchard" }
func (fakeModel) Robots() int  { return 2 }

func TestConfigRejected(t *testing.T) {
	m := harbor.RandomTiny(1)
	for _, c := range []Config{
		{Lambda: 1}, {Lambda: -0.5}, {Lambda: 1.5},
		{Bundle: -1}, {Bundle: MaxBundle + 1},
		{Range: -1}, {MaxRounds: -1},
		{Graph: [][]int{{0}}},
	} {
		if _, err := Wrap(m, c); err == nil {
			t.Errorf("%+v accepted", c)
		}
	}
}

// model.JointBaser's contract: BaseAll fills u with Base(s, r) for every
// r. Checked on the states of random walks in tiny instances, with the
// default all-to-all network and with a range-limited one.
func TestBaseMatchesBaseAll(t *testing.T) {
	for _, sc := range tinies() {
		for _, cfg := range []Config{{}, {Range: 1, Bundle: 1}} {
			for seed := uint64(1); seed <= 10; seed++ {
				m := sc.tiny(seed)
				a, err := Wrap(m, cfg)
				if err != nil {
					t.Fatal(err)
				}
				jb, ok := a.(model.JointBaser)
				if !ok {
					t.Fatal("the wrapped model is no JointBaser")
				}
				rng := model.NewRNG(seed)
				s := a.NewState()
				a.Start(s, rng.Rand)
				u := make([]int, a.Robots())
				walk := make([]int, a.Robots())
				for step := 0; step < 20 && !a.Terminal(s); step++ {
					jb.BaseAll(s, u)
					for r := range u {
						if b := a.Base(s, r); b != u[r] {
							t.Fatalf("%s seed %d step %d: Base(s,%d) = %d, BaseAll's u[%d] = %d", sc.name, seed, step, r, b, r, u[r])
						}
						if u[r] < 0 || u[r] >= a.NumControls(s, r) {
							t.Fatalf("%s seed %d: robot %d control %d out of range", sc.name, seed, r, u[r])
						}
						walk[r] = rng.IntN(a.NumControls(s, r))
					}
					a.Step(s, walk, rng.Rand)
				}
			}
		}
	}
}

// Each boat heads for the first slick of its path, the auction splitting
// them (source: the harbor's geometry, by hand): boats at (0,0) and (4,0)
// of a 5 x 1 harbor, slicks at (1,0) and (3,0). Boat 0 bids lambda^1 for
// the near slick, as does boat 1 for its own; each goes its own way
// rather than both chasing one.
func TestHarborBoatsSplit(t *testing.T) {
	m, err := harbor.New(harbor.Config{Width: 5, Height: 1, Robots: 2, Slicks: 2,
		Starts: [][2]int{{0, 0}, {4, 0}}, SlickCells: [][2]int{{1, 0}, {3, 0}},
		Discount: 0.9, Horizon: 10})
	if err != nil {
		t.Fatal(err)
	}
	a, err := Wrap(m, Config{})
	if err != nil {
		t.Fatal(err)
	}
	s := a.NewState()
	a.Start(s, model.NewRNG(1).Rand)
	u := make([]int, 2)
	model.BaseJoint(a, s, u)
	if u[0] != harbor.East || u[1] != harbor.West {
		t.Fatalf("controls %v, want [E W] (%d %d)", u, harbor.East, harbor.West)
	}
}

// The policy's counters (source: the message count's definition, one
// message per agent per neighbour per round): after one decision on the
// demo harbor's start (four boats, eight slicks), Rounds >= 1 and
// Messages = Rounds * 4 boats * 3 neighbours; a second decision adds up.
// With a range (boats scattered), each round costs the number of
// (boat, boat in range) pairs.
func TestPolicyCounters(t *testing.T) {
	m, err := harbor.Default(4)
	if err != nil {
		t.Fatal(err)
	}
	p, err := NewPolicy(m, Config{})
	if err != nil {
		t.Fatal(err)
	}
	if p.Name() != "auction" {
		t.Errorf("name %q", p.Name())
	}
	s := m.NewState()
	m.Start(s, model.NewRNG(7).Rand)
	out := make([]int, 4)
	if _, err := p.Decide(s, 1, out); err != nil {
		t.Fatal(err)
	}
	if p.Decisions != 1 || p.Rounds < 1 || p.Messages != p.Rounds*4*3 || p.Settled < 1 || p.Settled >= p.Rounds {
		t.Fatalf("after one decision: %+v", *p)
	}
	want := make([]int, 4)
	model.BaseJoint(p.Model(), s, want)
	if fmt.Sprint(out) != fmt.Sprint(want) {
		t.Errorf("Decide chose %v, the wrapped model's base %v", out, want)
	}
	rounds := p.Rounds
	if _, err := p.Decide(s, 2, out); err != nil {
		t.Fatal(err)
	}
	if p.Decisions != 2 || p.Rounds != 2*rounds || p.Messages != p.Rounds*4*3 {
		t.Fatalf("after the same decision twice: %+v", *p)
	}
	if _, err := p.Decide(s, 3, out[:3]); err == nil {
		t.Error("decided for 3 of 4 robots")
	}

	cfg := harbor.Defaults()
	cfg.Scatter = true
	scattered, err := harbor.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	p, err = NewPolicy(scattered, Config{Range: 6})
	if err != nil {
		t.Fatal(err)
	}
	st := scattered.NewState()
	scattered.Start(st, model.NewRNG(3).Rand)
	pairs := 0
	boats := st.(*harbor.State).Boats
	for a := range boats {
		for b := range boats {
			if a != b && scattered.Distance(boats[a], boats[b]) <= 6 {
				pairs++
			}
		}
	}
	if _, err := p.Decide(st, 1, out); err != nil {
		t.Fatal(err)
	}
	if pairs == 4*3 || p.Rounds < 1 || p.Messages != p.Rounds*pairs {
		t.Fatalf("range 6: %d pairs in range, %+v", pairs, *p)
	}
}

// With nothing to bid for there is no round and no message.
func TestPolicyNoTargets(t *testing.T) {
	m := harbor.RandomTiny(2)
	p, err := NewPolicy(m, Config{})
	if err != nil {
		t.Fatal(err)
	}
	s := m.NewState()
	m.Start(s, model.NewRNG(1).Rand)
	st := s.(*harbor.State)
	for i := range st.Slicks {
		st.Slicks[i] = -1
	}
	st.Left = 0
	out := make([]int, m.Robots())
	if _, err := p.Decide(s, 1, out); err != nil {
		t.Fatal(err)
	}
	for r, c := range out {
		if c != harbor.Hold {
			t.Errorf("robot %d: control %d with no slick left", r, c)
		}
	}
	if p.Decisions != 1 || p.Rounds != 0 || p.Messages != 0 {
		t.Errorf("%+v", *p)
	}
}

// An auction cut short by its round cap still gives controls (the paths as
// they stand) and is counted: by the policy when it decides, and by the
// wrapped model when rollout runs it as a base policy (Troubles).
func TestCutShortAuctionsCounted(t *testing.T) {
	m, err := harbor.Default(4)
	if err != nil {
		t.Fatal(err)
	}
	p, err := NewPolicy(m, Config{MaxRounds: 1})
	if err != nil {
		t.Fatal(err)
	}
	s := m.NewState()
	m.Start(s, model.NewRNG(7).Rand)
	out := make([]int, 4)
	if _, err := p.Decide(s, 1, out); err != nil {
		t.Fatal(err)
	}
	if p.Unsettled != 1 || p.Failed != 0 {
		t.Fatalf("policy counters %+v, want one unsettled auction", *p)
	}
	for r, c := range out {
		if c < 0 || c >= m.NumControls(s, r) {
			t.Fatalf("robot %d: control %d", r, c)
		}
	}
	if u, f, ok := Troubles(p.Model()); !ok || u != 0 || f != 0 {
		t.Fatalf("Decide's auction counted as a base policy's: %d %d %v", u, f, ok)
	}
	for range 3 {
		model.BaseJoint(p.Model(), s, out)
	}
	if u, f, ok := Troubles(p.Model()); !ok || u != 3 || f != 0 {
		t.Fatalf("troubles %d unsettled, %d failed (ok %v), want 3, 0", u, f, ok)
	}
	if _, _, ok := Troubles(m); ok {
		t.Fatal("a model the auction did not wrap has troubles to report")
	}
}
