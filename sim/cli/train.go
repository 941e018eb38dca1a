package cli

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"github.com/schollz/progressbar/v3"
	"golang.org/x/term"

	"baton/agentd/decide"
	"baton/signal/learn"
	"baton/sim/episode"
	"baton/sim/model"
)

type trainRow struct {
	Iteration   int     `json:"iteration"`
	BaseCost    float64 `json:"base_cost"`
	BaseCI95    float64 `json:"base_ci95"`
	RolloutCost float64 `json:"rollout_cost"`
	RolloutCI95 float64 `json:"rollout_ci95"`
	LearnedCost float64 `json:"learned_cost"`
	LearnedCI95 float64 `json:"learned_ci95"`
	Accuracy    float64 `json:"test_accuracy"`
	// Held-out accuracy per position in the turn order.
	AccuracyByPos []float64 `json:"test_accuracy_by_position"`
	// The policies the guesses induce: a fleet deciding in parallel, every
	// predecessor guessed (in order) by the net, or by the base policy;
	// Retained = (parallel base - parallel learned) / (parallel base -
	// rollout), from paired episodes.
	ParallelBaseCost    float64 `json:"parallel_base_cost"`
	ParallelBaseCI95    float64 `json:"parallel_base_ci95"`
	ParallelLearnedCost float64 `json:"parallel_learned_cost"`
	ParallelLearnedCI95 float64 `json:"parallel_learned_ci95"`
	Retained            float64 `json:"retained"`
	RetainedCI95        float64 `json:"retained_ci95"`
	DaggerRounds        int     `json:"dagger_rounds"`
	MajorityRate        float64 `json:"test_majority_rate"`
	TrainAccuracy       float64 `json:"train_accuracy"`
	Samples             int     `json:"train_samples"`
	CollectSecs         float64 `json:"collect_seconds"`
	TrainSecs           float64 `json:"train_seconds"`
	ModelBytes          int     `json:"model_bytes"`
}

type trainReport struct {
	Scenario   string     `json:"scenario"`
	Robots     int        `json:"robots"`
	Features   string     `json:"feature_version"`
	Iterations []trainRow `json:"iterations"`
	Out        string     `json:"out,omitempty"`
	Saved      int        `json:"saved_iteration,omitempty"`
	Version    uint64     `json:"version,omitempty"`
}

func cmdTrain(args []string) error {
	fs := newFlags("train", "Trains a classifier that imitates one-at-a-time rollout (the learned guess source)\nand, with --iterations K, repeats train-then-use-as-base: approximate policy\niteration. Each iteration collects rollout decisions on seeded episodes, trains\non some episodes and tests on the others, and evaluates on fresh episodes the\ncost of its base policy, of rollout on that base (the policy it imitates), and\nof the learned policy itself, with 95% confidence intervals.")
	var sc scenarioFlags
	sc.register(fs)
	episodes := fs.Int("episodes", 30, "episodes of rollout decisions to learn from, per iteration")
	testFrac := fs.Float64("test-frac", 0.25, "share of those episodes held out for testing")
	evalEpisodes := fs.Int("eval-episodes", 20, "fresh episodes to evaluate each iteration's policies on")
	iterations := fs.Int("iterations", 1, "train-then-use-as-base iterations")
	seed := fs.Uint64("seed", 1, "seed (the same seed retrains the same model, byte for byte)")
	samples := fs.Int("samples", 8, "Monte Carlo samples per Q-factor in the rollout that makes the labels")
	horizon := fs.Int("horizon", 15, "base-policy steps simulated after the first step")
	hidden := fs.String("hidden", "64", "hidden layer sizes, e.g. 64 or 64,32")
	dagger := fs.Int("dagger", 2, "rounds of on-policy data aggregation per iteration: play the fleet in parallel mode guessing with the new net, label the states it visits with rollout, retrain")
	epochs := fs.Int("epochs", 30, "training epochs")
	out := fs.String("out", "", "write the model of the iteration whose learned policy cost least here (a versioned model file)")
	version := fs.Uint64("version", 0, "version to write into the model file (default: 1 plus the version already in --out, or 1); fleets take only higher versions")
	asJSON := fs.Bool("json", false, "print one JSON object")
	if err := parse(fs, args); err != nil {
		return err
	}
	switch {
	case *episodes < 2:
		return fmt.Errorf("--episodes must be at least 2 (some to train on, some to test), got %d", *episodes)
	case *testFrac <= 0 || *testFrac >= 1:
		return fmt.Errorf("--test-frac must be between 0 and 1, got %g", *testFrac)
	case *evalEpisodes < 2:
		return fmt.Errorf("--eval-episodes must be at least 2 for a confidence interval, got %d", *evalEpisodes)
	case *iterations < 1 || *iterations > 50:
		return fmt.Errorf("--iterations must be between 1 and 50, got %d", *iterations)
	case *epochs < 1:
		return fmt.Errorf("--epochs %d: want at least 1", *epochs)
	case *dagger < 0 || *dagger > 20:
		return fmt.Errorf("--dagger %d: want 0 to 20 rounds", *dagger)
	case (decide.Config{Samples: *samples, Horizon: *horizon}).Validate() != nil:
		return (decide.Config{Samples: *samples, Horizon: *horizon}).Validate()
	}
	var layers []int
	for _, f := range strings.Split(*hidden, ",") {
		v, err := strconv.Atoi(strings.TrimSpace(f))
		if err != nil || v < 1 || v > 1024 {
			return fmt.Errorf("--hidden %q: want one or two layer sizes from 1 to 1024", *hidden)
		}
		layers = append(layers, v)
	}
	if len(layers) > 2 {
		return fmt.Errorf("--hidden %q: at most two layers", *hidden)
	}
	m, err := sc.load()
	if err != nil {
		return err
	}
	// Settle where the model goes and its version before the long part.
	if *out != "" {
		if fi, err := os.Stat(*out); err == nil && fi.IsDir() {
			return fmt.Errorf("--out %s is a directory; give a file name, e.g. %s", *out, filepath.Join(*out, m.Name()+".gm"))
		}
		probe, err := os.CreateTemp(filepath.Dir(*out), ".baton-train-*")
		if err != nil {
			return fmt.Errorf("--out: cannot write in %s: %w", filepath.Dir(*out), err)
		}
		probe.Close()
		os.Remove(probe.Name())
		if *version == 0 {
			*version = 1
			if _, meta, err := learn.Load(*out, m); err == nil {
				*version = meta.Version + 1
			}
		}
	}
	feat, err := learn.FeaturizerFor(m)
	if err != nil {
		return err
	}
	dcfg := decide.Config{Samples: *samples, Horizon: *horizon}
	rep := trainReport{Scenario: m.Name(), Robots: m.Robots(), Features: feat.Version(), Out: *out}
	var bar *progressbar.ProgressBar
	if !*asJSON && term.IsTerminal(int(os.Stderr.Fd())) {
		bar = progressbar.NewOptions(*iterations*(4+*dagger), progressbar.OptionSetWriter(os.Stderr),
			progressbar.OptionSetDescription("train"), progressbar.OptionClearOnFinish())
	}
	step := func(what string) {
		if bar != nil {
			bar.Describe(what)
			_ = bar.Add(1)
		}
	}
	var base model.Model = m
	var net, best *learn.Net
	bestIt, bestCost := 0, 0.0
	for it := 1; it <= *iterations; it++ {
		itSeed := model.Mix(*seed, uint64(it))
		t0 := time.Now()
		step(fmt.Sprintf("iteration %d: collecting", it))
		data, err := learn.Collect(m, dcfg, *episodes, itSeed, base)
		if err != nil {
			return err
		}
		collect := time.Since(t0)
		train, test := data.Split(*testFrac, itSeed)
		if train.Len() == 0 || test.Len() == 0 {
			return fmt.Errorf("iteration %d: the split left no training or no test samples (%d episodes gave %d decisions); raise --episodes, or use a scenario whose episodes take steps", it, *episodes, data.Len())
		}
		step(fmt.Sprintf("iteration %d: training", it))
		t1 := time.Now()
		var tr learn.TrainReport
		tcfg := learn.TrainConfig{Hidden: layers, Epochs: *epochs, Seed: itSeed, CreatedBy: fmt.Sprintf("sim train, iteration %d", it)}
		net, tr = learn.Train(feat, train, tcfg)
		var daggerCollect time.Duration
		for r := 1; r <= *dagger; r++ {
			step(fmt.Sprintf("iteration %d: on-policy data, round %d", it, r))
			t2 := time.Now()
			more, err := learn.CollectOnPolicy(m, dcfg, net, *episodes, model.Mix(itSeed, 0xda, uint64(r)), base)
			if err != nil {
				return err
			}
			daggerCollect += time.Since(t2)
			if err := train.Append(more); err != nil {
				return err
			}
			net, tr = learn.Train(feat, train, tcfg)
		}
		trainTime := time.Since(t1) - daggerCollect
		collect += daggerCollect
		acc := net.NoteHeldOut(test)
		byPos := net.AccuracyByPosition(test)
		blob, err := net.Marshal(uint64(it))
		if err != nil {
			return err
		}
		row := trainRow{Iteration: it, Accuracy: acc, MajorityRate: test.MajorityRate(), TrainAccuracy: tr.TrainAccuracy,
			Samples: train.Len(), CollectSecs: collect.Seconds(), TrainSecs: trainTime.Seconds(), ModelBytes: len(blob),
			AccuracyByPos: byPos, DaggerRounds: *dagger}
		// Fresh evaluation episodes, the same for every policy and iteration.
		step(fmt.Sprintf("iteration %d: evaluating", it))
		evalSeed := model.Mix(*seed, 0xe7a1)
		learned := learn.AsBase(m, net)
		d := decide.New(base, dcfg)
		policies := []decide.Policy{decide.Base{M: base}, nil, decide.Base{M: learned}, nil, nil}
		costs := make([][]float64, len(policies))
		for i := range *evalEpisodes {
			es := episode.Seed(evalSeed, i)
			policies[1] = decide.OneAtATimePolicy{D: d, Seed: episode.FleetSeed(es)}
			policies[3] = &parallelGuess{d: d, m: base, seed: episode.FleetSeed(es)}
			policies[4] = &parallelGuess{d: d, m: base, net: net, seed: episode.FleetSeed(es)}
			for p, pol := range policies {
				res, err := episode.Run(m, pol, es, nil)
				if err != nil {
					return err
				}
				costs[p] = append(costs[p], res.Cost)
			}
		}
		row.BaseCost, row.BaseCI95 = episode.MeanCI95(costs[0])
		row.RolloutCost, row.RolloutCI95 = episode.MeanCI95(costs[1])
		row.LearnedCost, row.LearnedCI95 = episode.MeanCI95(costs[2])
		row.ParallelBaseCost, row.ParallelBaseCI95 = episode.MeanCI95(costs[3])
		row.ParallelLearnedCost, row.ParallelLearnedCI95 = episode.MeanCI95(costs[4])
		gain, gap := make([]float64, *evalEpisodes), make([]float64, *evalEpisodes)
		for i := range gain {
			gain[i], gap[i] = costs[3][i]-costs[4][i], costs[3][i]-costs[1][i]
		}
		row.Retained, row.RetainedCI95 = episode.RatioCI95(gain, gap)
		rep.Iterations = append(rep.Iterations, row)
		if best == nil || row.LearnedCost < bestCost {
			best, bestIt, bestCost = net, it, row.LearnedCost
		}
		step(fmt.Sprintf("iteration %d: done", it))
		base = learned
	}
	if *out != "" {
		if err := best.Save(*out, *version); err != nil {
			return fmt.Errorf("--out: %w", err)
		}
		rep.Saved, rep.Version = bestIt, *version
	}
	if bar != nil {
		_ = bar.Finish()
	}
	if *asJSON {
		enc := json.NewEncoder(os.Stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(rep)
	}
	fmt.Printf("%s, %d robots, features %s; costs are means over %d fresh episodes with 95%% CI\n\n",
		rep.Scenario, rep.Robots, rep.Features, *evalEpisodes)
	fmt.Printf("%4s  %16s  %16s  %16s  %9s  %8s  %8s  %9s  %7s\n", "iter", "base policy", "rollout on it", "learned policy",
		"test acc", "majority", "samples", "train s", "bytes")
	for _, r := range rep.Iterations {
		fmt.Printf("%4d  %16s  %16s  %16s  %9.3f  %8.3f  %8d  %9.2f  %7d\n", r.Iteration,
			fmt.Sprintf("%.2f ±%.2f", r.BaseCost, r.BaseCI95), fmt.Sprintf("%.2f ±%.2f", r.RolloutCost, r.RolloutCI95),
			fmt.Sprintf("%.2f ±%.2f", r.LearnedCost, r.LearnedCI95), r.Accuracy, r.MajorityRate, r.Samples, r.TrainSecs, r.ModelBytes)
	}
	fmt.Printf("\nparallel fleets (every predecessor guessed) on the same episodes:\n%4s  %16s  %16s  %14s  %s\n",
		"iter", "base guesses", "learned guesses", "retained", "held-out accuracy by turn position")
	for _, r := range rep.Iterations {
		fmt.Printf("%4d  %16s  %16s  %14s  %.3f\n", r.Iteration,
			fmt.Sprintf("%.2f ±%.2f", r.ParallelBaseCost, r.ParallelBaseCI95), fmt.Sprintf("%.2f ±%.2f", r.ParallelLearnedCost, r.ParallelLearnedCI95),
			fmt.Sprintf("%.3f ±%.3f", r.Retained, r.RetainedCI95), r.AccuracyByPos)
	}
	fmt.Println("\nretained = (parallel base - parallel learned) / (parallel base - rollout); iteration i+1's base policy is iteration i's learned policy.")
	if *out != "" {
		fmt.Printf("iteration %d's model (its learned policy cost least) written to %s as version %d\n", rep.Saved, *out, rep.Version)
	}
	return nil
}

// parallelGuess is a fleet deciding in parallel mode: every robot guesses
// all its predecessors (in order, with net; nil: the base policy), then
// takes its rollout turn.
type parallelGuess struct {
	d     *decide.Decider
	m     model.Model
	net   *learn.Net
	seed  uint64
	known []int
}

func (p *parallelGuess) Name() string { return "parallel" }

func (p *parallelGuess) Decide(x model.State, round int, out []int) (decide.Stats, error) {
	n := p.m.Robots()
	if len(p.known) != n {
		p.known = make([]int, n)
	}
	for k := range n {
		if p.net != nil {
			p.net.GuessInOrder(p.m, x, k, p.known)
		} else {
			for j := range p.known {
				p.known[j] = -1 // at base: what decide assumes of unknowns
			}
		}
		out[k], _ = p.d.Turn(x, k, p.known, decide.TurnSeed(p.seed, round, k))
	}
	return decide.Stats{}, nil
}
