package decide

import (
	"runtime"
	"sync"
	"sync/atomic"
	"time"
)

// spinFor is how long an idle pool worker keeps polling for the next job
// before it parks, when jobs have been coming that close together.
// Starting or waking a goroutine on an idle core took 130-200 us (median;
// sim bench search measures it) on the 2-vCPU machines here, about a whole
// turn's work, so a freshly woken worker would mostly arrive after the turn
// was done; a worker still polling joins in well under a microsecond.
// Back-to-back turns (a whole decision, a comparison) keep their workers
// polling. A robot's single turn per round does not: its jobs come
// milliseconds apart, so its workers park at once rather than take a core
// from other processes (on one machine, the next robot's turn), and each
// turn pays one wake.
const spinFor = 200 * time.Microsecond

// job is one parallel evaluation: tasks 0..tasks-1, claimed through next,
// run by run(worker index, task); pending counts those not yet finished.
type job struct {
	tasks   int
	next    atomic.Int64
	pending atomic.Int64
	run     func(w, task int)
}

// pool keeps a Decider's extra workers (indices 1..n-1) between
// evaluations; the caller is worker 0. It holds no reference to the
// Decider, so a Decider nobody uses any more is collected and its cleanup
// stops the pool.
type pool struct {
	n      int // workers besides the caller
	gen    atomic.Uint64
	cur    atomic.Pointer[job]
	quit   atomic.Bool
	parked atomic.Int32
	spin   atomic.Bool // the last two jobs came within spinFor: poll between them
	last   time.Time   // when the caller's last job ended (do is never concurrent)
	mu     sync.Mutex
	wake   *sync.Cond
	start  sync.Once
}

func newPool(extra int) *pool {
	p := &pool{n: extra}
	p.wake = sync.NewCond(&p.mu)
	return p
}

// do runs tasks on the caller and the pool's workers and returns when all
// have finished.
func (p *pool) do(tasks int, run func(w, task int)) {
	p.start.Do(func() {
		for w := 1; w <= p.n; w++ {
			go p.loop(w)
		}
	})
	p.spin.Store(!p.last.IsZero() && time.Since(p.last) < spinFor)
	j := &job{tasks: tasks, run: run}
	j.pending.Store(int64(tasks))
	p.cur.Store(j)
	p.gen.Add(1)
	if p.parked.Load() > 0 {
		p.mu.Lock()
		p.wake.Broadcast()
		p.mu.Unlock()
	}
	j.work(0)
	// Whatever is still running belongs to workers that are busy with it:
	// poll rather than park, it ends within one task.
	for j.pending.Load() > 0 {
		runtime.Gosched()
	}
	p.cur.Store(nil) // let the job's closure (and what it holds) go
	p.last = time.Now()
}

func (j *job) work(w int) {
	for {
		i := int(j.next.Add(1) - 1)
		if i >= j.tasks {
			return
		}
		j.run(w, i)
		j.pending.Add(-1)
	}
}

func (p *pool) loop(w int) {
	seen := uint64(0)
	for {
		t0 := time.Now()
		for spins := 0; p.gen.Load() == seen && !p.quit.Load(); spins++ {
			if !p.spin.Load() || (spins&63 == 63 && time.Since(t0) > spinFor) {
				p.mu.Lock()
				p.parked.Add(1)
				for p.gen.Load() == seen && !p.quit.Load() {
					p.wake.Wait()
				}
				p.parked.Add(-1)
				p.mu.Unlock()
				break
			}
			runtime.Gosched() // lets anything else runnable have this core
		}
		if p.quit.Load() {
			return
		}
		seen = p.gen.Load()
		if j := p.cur.Load(); j != nil {
			j.work(w)
		}
	}
}

// stop ends the pool's workers (when its Decider is collected).
func (p *pool) stop() {
	p.quit.Store(true)
	p.mu.Lock()
	p.wake.Broadcast()
	p.mu.Unlock()
}
