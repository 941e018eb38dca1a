// Package fleetsum is what both forms of `sim fleet` (real processes over
// NATS, and the virtual-time fleet) report: per-round results, the summary
// and the decisions digest, computed the same way so two runs compare.
package fleetsum

import (
	"baton/sim/model"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"hash"
	"sort"
)

// Round is what the world saw of one round.
type Round struct {
	Round int
	Cost  float64
	// Decided is each robot's control as served to its software, -1 where
	// it held; the world carries out 0 (stay) for those.
	Decided   []int
	Guessed   int // robots that decided with a guess
	Held      int // robots without a decision (they hold)
	LatencyUs uint64
	// GuessedBy lists the robots that decided with a guess; Mode is the
	// round's mode as the coordinator ran it (virtual fleet; "" when not
	// known).
	GuessedBy []int
	Mode      string
}

// Controls is what the world carries out: Decided with holds as 0.
func (r Round) Controls() []int {
	u := make([]int, len(r.Decided))
	for i, c := range r.Decided {
		u[i] = max(c, 0)
	}
	return u
}

// Summary is a fleet run's summary (`sim fleet --json`).
type Summary struct {
	Scenario string  `json:"scenario"`
	Robots   int     `json:"robots"`
	Rounds   int     `json:"rounds"`
	Mode     string  `json:"mode"`
	Guess    string  `json:"guess"`
	Virtual  bool    `json:"virtual"`
	Cost     float64 `json:"cost"`
	// TrueCost is the world's true cost, where it keeps a belief
	// scenario's hidden truth (sim fleet --true-wear).
	TrueCost *float64 `json:"true_cost,omitempty"`
	// CostKind says what Cost is (see CostKind).
	CostKind     string  `json:"cost_kind"`
	CostPerRound float64 `json:"cost_per_round"`
	Batches      int     `json:"batches_finished"`
	LatencyP50Ms float64 `json:"round_latency_p50_ms"`
	LatencyP99Ms float64 `json:"round_latency_p99_ms"`
	TurnsGuessed int     `json:"turns_with_guesses"`
	RobotsHeld   int     `json:"robot_rounds_held"`
	// DecisionsSHA256 digests every round's (round, robot, decided
	// control) in order: equal digests mean equal decisions.
	DecisionsSHA256 string  `json:"decisions_sha256"`
	WallSeconds     float64 `json:"wall_seconds"`
	RoundsPerSecond float64 `json:"rounds_per_second"`
	// ComputeShare is the share of wall time spent in rollout (virtual
	// fleet only: real daemons compute in their own processes).
	ComputeShare  float64 `json:"compute_share,omitempty"`
	AgentdMaxRSS  int64   `json:"agentd_max_rss_kb,omitempty"`
	DecisionLog   string  `json:"decision_log,omitempty"`
	ProcessLogDir string  `json:"process_logs,omitempty"`
	// DurableLog is the coordinator's durable decision log (the JetStream
	// stream) exported to a file when the run ended: `sim replay --file`.
	DurableLog string `json:"durable_log_export,omitempty"`
}

// Tally accumulates rounds into a summary.
type Tally struct {
	h   hash.Hash
	lat []float64
	buf [16]byte
}

// NewTally starts an empty tally.
func NewTally() *Tally { return &Tally{h: sha256.New()} }

// Add counts one round into s.
func (t *Tally) Add(s *Summary, r Round) {
	for robot, c := range r.Decided {
		binary.LittleEndian.PutUint64(t.buf[0:], uint64(r.Round))
		binary.LittleEndian.PutUint32(t.buf[8:], uint32(robot))
		binary.LittleEndian.PutUint32(t.buf[12:], uint32(int32(c)))
		t.h.Write(t.buf[:])
	}
	t.lat = append(t.lat, float64(r.LatencyUs)/1000)
	s.Rounds = r.Round
	s.Cost += r.Cost
	s.TurnsGuessed += r.Guessed
	s.RobotsHeld += r.Held
}

// Finish fills in the digest, the latency quantiles and the per-round cost.
func (t *Tally) Finish(s *Summary) {
	s.DecisionsSHA256 = hex.EncodeToString(t.h.Sum(nil))
	s.LatencyP50Ms, s.LatencyP99Ms = Quantile(t.lat, 0.5), Quantile(t.lat, 0.99)
	if s.Rounds > 0 {
		s.CostPerRound = s.Cost / float64(s.Rounds)
	}
	if s.WallSeconds > 0 {
		s.RoundsPerSecond = float64(s.Rounds) / s.WallSeconds
	}
}

// Quantile is the nearest-rank quantile of xs (0 when empty).
func Quantile(xs []float64, q float64) float64 {
	if len(xs) == 0 {
		return 0
	}
	s := append([]float64(nil), xs...)
	sort.Float64s(s)
	return s[int(q*float64(len(s)-1)+0.5)]
}

// CostKind says what a fleet run's cost is for scenario m: the world's
// stage costs summed without discount.
func CostKind(m model.Model) string {
	return "undiscounted sum of the world's stage costs, " + model.StageKind(m)
}
