package drill

import (
	"cmp"
	"context"
	"fmt"
	"math"
	"slices"
	"sync"
	"time"

	"gonum.org/v1/gonum/stat"

	"baton/agentd/node"
	"baton/agentd/turn"
	"baton/coordinator/clock"
	"baton/signal"
	"baton/signal/learn"
	"baton/sim/drill/result"
	"baton/sim/episode"
	"baton/sim/fault"
	"baton/sim/fleetsum"
	"baton/sim/model"
	"baton/sim/vfleet"
	"baton/sim/world"
)

// Episode is one fleet run of one configuration.
type Episode struct {
	Rounds []fleetsum.Round
	Faults fault.Stats
	Late   uint64
	// Events a process run reports (kills, restarts), in order.
	Events []string
	// VirtualTime is the fleet time the run took (0 for real processes).
	VirtualTime time.Duration
	// Paths: how the checked source made its guesses.
	Paths signal.Paths
}

// Cost is the episode's total stage cost.
func (e Episode) Cost() float64 {
	c := 0.0
	for _, r := range e.Rounds {
		c += r.Cost
	}
	return c
}

// Job is one run: a point of the sweep on one episode, with the faults it
// sees (the drill's and the point's channel).
type Job struct {
	Drill   *Drill
	Point   Point
	Episode int
	// World is the episode seed; Clock the coordinator's configuration
	// (its fleet seed derives from World); Faults and FaultSeed the
	// fault layer's schedule and seed.
	World     uint64
	Clock     clock.Config
	Faults    []fault.Spec
	FaultSeed uint64
	Guesses   signal.Options
	// OnFiled gets every round's decision-log record (virtual runs).
	OnFiled func(clock.Record)
}

// Runner runs jobs that need real processes.
type Runner interface {
	RunProcess(ctx context.Context, j Job) (Episode, error)
}

// Options of a drill run.
type Options struct {
	// Workers run jobs at once (0: 1).
	Workers int
	// Progress is called after each finished job (from one goroutine at a
	// time).
	Progress func(done, total int)
	// Processes runs the jobs of a drill with process faults.
	Processes Runner
	// Gossip measures false-dead declarations for a set of link faults
	// (nil: not measured, reported as -1).
	Gossip func(ctx context.Context, robots int, specs []fault.Spec) (int, error)
	// Now is the wall clock, for the report's timing (nil: not timed).
	Now func() time.Time
	// Classifier for learned guesses (nil: Load the drill's guess_model,
	// or train one when it names none).
	Classifier *learn.Net
	// Worst, when set, gets the worst episode of each of the Replays
	// virtual configurations with the highest mean cost, played again (the
	// same seeds replay it exactly) with every round's decision-log record,
	// and returns the name of the replay it made (result.Config.Replay).
	Worst   func(c result.Config, records []clock.Record) (string, error)
	Replays int
}

// Classifier loads the drill's guess model, or trains a small one on
// one-at-a-time rollout episodes when the drill names none.
func (d *Drill) Classifier() (*learn.Net, error) {
	if d.GuessModel != "" {
		net, _, err := learn.Load(d.GuessModel, d.Model)
		if err != nil {
			return nil, fmt.Errorf("%s: guess_model: %w", d.File, err)
		}
		return net, nil
	}
	data, err := learn.Collect(d.Model, d.Decide, d.TrainEpisodes, model.Mix(d.Seed, 0x747261696e), nil)
	if err != nil {
		return nil, fmt.Errorf("training the guess model: %w", err)
	}
	feat, err := learn.FeaturizerFor(d.Model)
	if err != nil {
		return nil, fmt.Errorf("training the guess model: %w", err)
	}
	cfg := learn.TrainConfig{Seed: d.Seed, Hidden: []int{64}}
	net, _ := learn.Train(feat, data, cfg)
	for r := 1; r <= d.TrainDagger; r++ {
		more, err := learn.CollectOnPolicy(d.Model, d.Decide, net, d.TrainEpisodes, model.Mix(d.Seed, 0xda, uint64(r)), nil)
		if err != nil {
			return nil, fmt.Errorf("training the guess model: %w", err)
		}
		if err := data.Append(more); err != nil {
			return nil, err
		}
		net, _ = learn.Train(feat, data, cfg)
	}
	return net, nil
}

// Job is the run of point p on episode e.
func (d *Drill) Job(p Point, e int, guesses signal.Options) Job {
	ep := episode.Seed(d.Seed, e)
	c := clock.DefaultConfig()
	c.Fleet, c.Model, c.Digest, c.Seed, c.Epoch = "drill", d.Model, "drill", episode.FleetSeed(ep), 1
	c.Decide, c.TurnBudget, c.Period, c.Guess = d.Decide, d.TurnBudget, d.Period, p.Guess
	switch p.Mode {
	case "auto":
		c.Mode, c.AutoParallel = turn.Hybrid, true
	default:
		c.Mode, _ = turn.ParseMode(p.Mode)
	}
	specs := append(slices.Clone(d.Faults), p.Channel...)
	return Job{Drill: d, Point: p, Episode: e, World: ep, Clock: c, Faults: specs, FaultSeed: model.Mix(ep, 4), Guesses: guesses}
}

// RunVirtual plays a job on the virtual-time fleet.
func RunVirtual(j Job) (Episode, error) {
	d := j.Drill
	rc := node.DefaultConfig()
	cfg := vfleet.Config{Clock: j.Clock, Stale: rc.Stale, Guess: "base", Guesses: j.Guesses, GuessMargin: rc.GuessMargin,
		World: j.World, Link: vfleet.Link{Hop: d.Hop, Jitter: d.Jitter, Seed: model.Mix(j.World, 5)}, TurnTime: d.TurnTime,
		Faults: j.Faults, FaultSeed: j.FaultSeed, Wait: d.SoftwareWait(), OnFiled: j.OnFiled}
	f, err := vfleet.New(cfg)
	if err != nil {
		return Episode{}, err
	}
	rounds, err := f.Run(d.Rounds, nil)
	if err != nil {
		return Episode{}, fmt.Errorf("%s, episode %d: %w", j.Point.Name(), j.Episode, err)
	}
	if j.OnFiled != nil {
		f.Finish()
	}
	return Episode{Rounds: rounds, Faults: f.FaultStats(), Late: f.Late(), VirtualTime: f.Now(), Paths: f.GuessPaths()}, nil
}

// SoftwareWait is how long a robot's own software waits for a round's
// decision before it holds: the longest a round can take (every turn's
// deadline, the grace, a period). A robot cut off from the coordinator
// holds after that instead of keeping the rest of the world waiting.
func (d *Drill) SoftwareWait() time.Duration {
	return time.Duration(d.Model.Robots()+2)*d.TurnBudget + d.Period
}

// BaseCost plays the base policy alone in episode e's world.
func (d *Drill) BaseCost(e int) float64 {
	w := world.New(d.Model, episode.Seed(d.Seed, e))
	u := make([]int, d.Model.Robots())
	for range d.Rounds {
		model.BaseJoint(d.Model, w.Y, u)
		w.Apply(u)
	}
	return w.Cost
}

// Run plays every configuration of the drill on every episode, and the
// two references (base policy; sequential rollout without faults), and
// reports.
func Run(ctx context.Context, d *Drill, o Options) (*result.Report, error) {
	var t0 time.Time
	if o.Now != nil {
		t0 = o.Now()
	}
	if d.Process() && o.Processes == nil {
		return nil, errNoRunner
	}
	var guesses signal.Options
	if o.Classifier != nil { // a nil *Net in the interface would not read as nil
		guesses.Classifier = o.Classifier
	}
	if guesses.Classifier == nil && slices.ContainsFunc(d.Points, func(p Point) bool { return p.Guess == "learned" || p.Guess == "checked" }) {
		net, err := d.Classifier()
		if err != nil {
			return nil, err
		}
		guesses.Classifier = net
	}
	// Jobs: the sequential reference first, then every point, episode by
	// episode.
	seqPoint := Point{Mode: "sequential", Guess: "base"}
	var jobs []Job
	for e := range d.Episodes {
		j := d.Job(seqPoint, e, guesses)
		j.Faults = nil // the reference runs without faults
		jobs = append(jobs, j)
	}
	for _, p := range d.Points {
		for e := range d.Episodes {
			jobs = append(jobs, d.Job(p, e, guesses))
		}
	}
	results := make([]Episode, len(jobs))
	errs := make([]error, len(jobs))
	// Progress counts fleet runs and then membership runs (real time).
	total := len(jobs)
	if o.Gossip != nil {
		sets := map[string]bool{}
		for _, p := range d.Points {
			sets[fmt.Sprint(append(slices.Clone(d.Faults), p.Channel...))] = true
		}
		total += len(sets)
	}
	workers := max(o.Workers, 1)
	if d.Process() {
		workers = 1 // real fleets share the machine's ports and cores
	}
	next := make(chan int)
	var wg sync.WaitGroup
	var mu sync.Mutex
	done := 0
	for range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range next {
				j := jobs[i]
				var ep Episode
				var err error
				if d.Process() && i >= d.Episodes {
					ep, err = o.Processes.RunProcess(ctx, j)
				} else {
					ep, err = RunVirtual(j)
				}
				results[i], errs[i] = ep, err
				mu.Lock()
				done++
				if o.Progress != nil {
					o.Progress(done, total)
				}
				mu.Unlock()
			}
		}()
	}
feed:
	for i := range jobs {
		select {
		case <-ctx.Done():
			break feed
		case next <- i:
		}
	}
	close(next)
	wg.Wait()
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	for _, err := range errs {
		if err != nil {
			return nil, err
		}
	}
	rep := &result.Report{Drill: d.Name, Scenario: d.Scenario, Robots: d.Model.Robots(), Rounds: d.Rounds,
		Episodes: d.Episodes, Seed: d.Seed}
	base := make([]float64, d.Episodes)
	seq := make([]float64, d.Episodes)
	for e := range d.Episodes {
		base[e] = d.BaseCost(e)
		seq[e] = results[e].Cost()
		rep.VirtualSeconds += results[e].VirtualTime.Seconds()
	}
	rep.BaseCost, rep.BaseCI95 = episode.MeanCI95(base)
	rep.SequentialCost, rep.SequentialCI95 = episode.MeanCI95(seq)
	// Membership is measured once per distinct set of link faults.
	falseDead := map[string]int{}
	gossipErr := map[string]string{}
	var gossipTime time.Duration
	for pi, p := range d.Points {
		eps := results[d.Episodes*(pi+1) : d.Episodes*(pi+2)]
		c := summarize(d, p, eps, base, seq)
		for _, ep := range eps {
			rep.VirtualSeconds += ep.VirtualTime.Seconds()
		}
		c.FalseDead = -1
		if o.Gossip != nil {
			specs := append(slices.Clone(d.Faults), p.Channel...)
			key := fmt.Sprint(specs)
			n, ok := falseDead[key]
			if !ok {
				var g0 time.Time
				if o.Now != nil {
					g0 = o.Now()
				}
				var err error
				if n, err = o.Gossip(ctx, d.Model.Robots(), specs); err != nil {
					if ctx.Err() != nil {
						return nil, ctx.Err()
					}
					// Gossip could not even form under these faults (a
					// partition, say): nothing to count, and that is news.
					n = -1
					gossipErr[key] = err.Error()
				}
				falseDead[key] = n
				if done++; o.Progress != nil {
					o.Progress(done, total)
				}
				if o.Now != nil {
					gossipTime += o.Now().Sub(g0)
				}
			}
			c.FalseDead = n
			if e := gossipErr[key]; e != "" {
				c.Events = append(c.Events, "membership not measured: "+e)
			}
		}
		if d.Process() {
			c.Process = true
			rep.ProcessConfigs++
		}
		rep.Configs = append(rep.Configs, c)
	}
	if o.Worst != nil && !d.Process() {
		// The configurations that cost most: their worst episode again,
		// with every round's record (the same seeds replay it exactly).
		idx := make([]int, len(rep.Configs))
		for i := range idx {
			idx[i] = i
		}
		slices.SortStableFunc(idx, func(a, b int) int { return cmp.Compare(rep.Configs[b].MeanCost, rep.Configs[a].MeanCost) })
		for _, i := range idx[:min(len(idx), max(o.Replays, 0))] {
			c := &rep.Configs[i]
			j := d.Job(d.Points[i], c.WorstEpisode, guesses)
			var recs []clock.Record
			j.OnFiled = func(r clock.Record) { recs = append(recs, r) }
			if _, err := RunVirtual(j); err != nil {
				return nil, err
			}
			replay, err := o.Worst(*c, recs)
			if err != nil {
				return nil, err
			}
			c.Replay = replay
		}
	}
	rep.GossipSecondsSpent = gossipTime.Seconds()
	if o.Now != nil {
		rep.WallSeconds = o.Now().Sub(t0).Seconds()
	}
	return rep, nil
}

// summarize turns a point's episodes into its report line.
func summarize(d *Drill, p Point, eps []Episode, base, seq []float64) result.Config {
	m := d.Model.Robots()
	c := result.Config{Name: p.Name(), Mode: p.Mode, Guess: p.Guess, Loss: p.Loss, Burst: p.Burst,
		PerRobot: make([]result.Robot, m)}
	for _, s := range d.Faults {
		c.Faults = append(c.Faults, s.Describe())
	}
	for r := range c.PerRobot {
		c.PerRobot[r].Robot = r
	}
	var gain, gap, lat []float64
	decided, guessed := 0, 0
	var after, back []float64
	for e, ep := range eps {
		cost := ep.Cost()
		c.EpisodeCosts = append(c.EpisodeCosts, cost)
		gain = append(gain, base[e]-cost)
		gap = append(gap, base[e]-seq[e])
		c.Dropped += ep.Faults.Dropped
		c.Duplicated += ep.Faults.Duplicated
		c.Late += ep.Late
		c.Events = append(c.Events, ep.Events...)
		if p.Guess == "checked" {
			c.GuessPaths.Confident += ep.Paths.Confident
			c.GuessPaths.Recomputed += ep.Paths.Recomputed
			c.GuessPaths.FellBack += ep.Paths.FellBack
		}
		for _, r := range ep.Rounds {
			lat = append(lat, float64(r.LatencyUs)/1000)
			c.HeldRounds += r.Held
			decided += len(r.Decided) - r.Held
			guessed += r.Guessed
			for i, u := range r.Decided {
				if u < 0 && i < m {
					c.PerRobot[i].Held++
				}
			}
			for _, i := range r.GuessedBy {
				if i < m {
					c.PerRobot[i].Guessed++
				}
			}
			if r.Mode == "parallel" && p.Mode == "auto" {
				c.ParallelRounds++
			}
		}
		if p.Mode == "auto" {
			if a, b, ok := switches(d, ep.Rounds); ok {
				after = append(after, a)
				if b >= 0 {
					back = append(back, b)
				}
			}
		}
	}
	c.MeanCost, c.CI95 = episode.MeanCI95(c.EpisodeCosts)
	c.Retained, c.RetainedCI95 = episode.RatioCI95(gain, gap)
	if decided > 0 {
		c.GuessedShare = float64(guessed) / float64(decided)
	}
	if len(lat) > 0 {
		slices.Sort(lat)
		c.LatencyP50Ms = quantile(lat, 0.5)
		c.LatencyP99Ms = quantile(lat, 0.99)
		c.Latency = histogram(lat, 24)
	}
	if len(after) > 0 {
		c.SwitchAfter = int(math.Round(stat.Mean(after, nil)))
	}
	if len(back) > 0 {
		c.SwitchBackAfter = int(math.Round(stat.Mean(back, nil)))
	}
	for i, v := range c.EpisodeCosts {
		if v > c.EpisodeCosts[c.WorstEpisode] {
			c.WorstEpisode = i
		}
	}
	return c
}

// switches measures the automatic switch against the drill's first
// windowed delay fault: rounds from the window's start to the first
// parallel round, and from its end to the first round not parallel
// (-1 when it never switched back).
func switches(d *Drill, rounds []fleetsum.Round) (after, back float64, ok bool) {
	i := slices.IndexFunc(d.Faults, func(s fault.Spec) bool { return s.Kind == fault.Delay && s.From > 0 && s.Until > 0 })
	if i < 0 {
		return 0, 0, false
	}
	from, until := d.Faults[i].From, d.Faults[i].Until
	first := -1
	for _, r := range rounds {
		if r.Round >= from && r.Mode == "parallel" {
			first = r.Round
			break
		}
	}
	if first < 0 {
		return 0, 0, false
	}
	back = -1
	for _, r := range rounds {
		if r.Round > until && r.Mode != "parallel" && r.Mode != "" {
			back = float64(r.Round - until)
			break
		}
	}
	return float64(first - from), back, true
}

// quantile of sorted xs, nearest rank.
func quantile(xs []float64, q float64) float64 {
	i := int(math.Ceil(q*float64(len(xs)))) - 1
	return xs[min(max(i, 0), len(xs)-1)]
}

func histogram(sorted []float64, bins int) result.Histogram {
	hi := sorted[len(sorted)-1]
	if hi <= 0 {
		hi = 1
	}
	h := result.Histogram{EdgesMs: make([]float64, bins+1), Counts: make([]int, bins)}
	for i := range h.EdgesMs {
		h.EdgesMs[i] = hi * float64(i) / float64(bins)
	}
	for _, v := range sorted {
		b := min(int(v/hi*float64(bins)), bins-1)
		h.Counts[max(b, 0)]++
	}
	return h
}
