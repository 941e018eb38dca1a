// Package result holds a drill's report: the figures per configuration,
// as JSON, as a table for the terminal, and as one self-contained HTML page
// with plots.
package result

// Report is one drill's outcome. Costs are per episode (the sum of stage
// costs over the drill's rounds), averaged over the drill's seeded
// episodes; every configuration saw the same episodes.
type Report struct {
	Drill    string `json:"drill"` // the drill file's name
	Scenario string `json:"scenario"`
	Robots   int    `json:"robots"`
	Rounds   int    `json:"rounds"`
	Episodes int    `json:"episodes"`
	Seed     uint64 `json:"seed"`
	// The two references, run without faults: the base policy alone and
	// one-at-a-time (sequential) rollout.
	BaseCost           float64  `json:"base_cost"`
	BaseCI95           float64  `json:"base_ci95"`
	SequentialCost     float64  `json:"sequential_cost"`
	SequentialCI95     float64  `json:"sequential_ci95"`
	Configs            []Config `json:"configs"`
	WallSeconds        float64  `json:"wall_seconds"`
	VirtualSeconds     float64  `json:"virtual_seconds"` // fleet time simulated, all configurations
	ProcessConfigs     int      `json:"process_configs"` // configurations run as real processes
	GossipSecondsSpent float64  `json:"gossip_seconds"`  // wall time of the membership runs
}

// Config is one point of the drill's sweep.
type Config struct {
	Name string `json:"name"` // e.g. "hybrid recompute loss=0.2"
	Mode string `json:"mode"` // hybrid, parallel, sequential, auto
	// Guess is the guess source (base, last, recompute, learned).
	Guess string `json:"guess"`
	// Loss is the long-run message loss rate of the swept channel; Burst
	// the mean length of a loss burst in messages (0: independent loss).
	Loss  float64 `json:"loss"`
	Burst float64 `json:"burst"`
	// Faults describes the rest of the schedule, one line per fault.
	Faults []string `json:"faults,omitempty"`

	MeanCost float64 `json:"mean_cost"`
	CI95     float64 `json:"ci95"` // half-width of the 95% interval of MeanCost
	// Retained = (J_base - J_drill) / (J_base - J_sequential), from paired
	// episodes, with the half-width of its 95% interval.
	Retained     float64 `json:"retained"`
	RetainedCI95 float64 `json:"retained_ci95"`
	// GuessedShare: turns decided with at least one guess / turns decided.
	GuessedShare float64 `json:"guessed_share"`
	// HeldRounds: robot-rounds held (no valid decision in time).
	HeldRounds   int     `json:"held_rounds"`
	LatencyP50Ms float64 `json:"latency_p50_ms"`
	LatencyP99Ms float64 `json:"latency_p99_ms"`
	// Messages the fault layer dropped, delivered twice, and decisions
	// that arrived after their round closed.
	Dropped    uint64 `json:"dropped"`
	Duplicated uint64 `json:"duplicated"`
	Late       uint64 `json:"late"`
	// FalseDead: robots the membership layer declared dead while they
	// were alive, under this configuration's link faults (-1: not measured).
	FalseDead int `json:"false_dead"`
	// ModeSwitches: rounds played in parallel by the automatic switch, and
	// how many rounds it took to switch after a link degraded and back
	// after it recovered (0 when it did not happen).
	ParallelRounds  int `json:"parallel_rounds,omitempty"`
	SwitchAfter     int `json:"switch_after_rounds,omitempty"`
	SwitchBackAfter int `json:"switch_back_after_rounds,omitempty"`
	// GuessPaths: how the checked source made its guesses (sure learned
	// guesses, weak ones recomputed, weak ones kept for lack of time).
	GuessPaths   GuessPaths `json:"guess_paths"`
	Latency      Histogram  `json:"latency_hist"`
	PerRobot     []Robot    `json:"per_robot"`
	EpisodeCosts []float64  `json:"episode_costs"`
	WorstEpisode int        `json:"worst_episode"` // index into EpisodeCosts
	// Replay is the worst episode's replay page (a file beside the report,
	// written by sim drill --html; "" when none was made).
	Replay  string   `json:"replay,omitempty"`
	Process bool     `json:"process,omitempty"` // run as real processes
	Events  []string `json:"events,omitempty"`  // what a process drill did, in order
}

// Histogram of round latencies: Counts[i] rounds took [EdgesMs[i],
// GuessPaths counts the checked source's paths.
type GuessPaths struct {
	Confident  uint64 `json:"confident"`
	Recomputed uint64 `json:"recomputed"`
	FellBack   uint64 `json:"fell_back"`
}

// EdgesMs[i+1]) milliseconds.
type Histogram struct {
	EdgesMs []float64 `json:"edges_ms"`
	Counts  []int     `json:"counts"`
}

// Robot is one robot's tally over every episode of a configuration.
type Robot struct {
	Robot   int `json:"robot"`
	Held    int `json:"held"`    // rounds it held
	Guessed int `json:"guessed"` // turns it decided with guesses
}
