package learn

import (
	"sync"
	"testing"
)

func TestFeaturesAndPredictDoNotAllocate(t *testing.T) {
	for _, name := range []string{"harbor", "upkeep"} {
		t.Run(name, func(t *testing.T) {
			fx := getFixture(t, name)
			dst := make([]float64, fx.f.Size())
			R := fx.m.Robots()
			i := 0
			if a := testing.AllocsPerRun(200, func() {
				x := fx.states[i%len(fx.states)]
				fx.f.Features(x, i%R, (i/R)%R, nil, dst)
				i++
			}); a != 0 {
				t.Errorf("Features: %v allocations per call", a)
			}
			if raceEnabled {
				t.Skip("sync.Pool drops items at random under the race detector")
			}
			fx.net.Predict(fx.states[0], 0, 0) // warm the pool
			if a := testing.AllocsPerRun(200, func() {
				x := fx.states[i%len(fx.states)]
				fx.net.Predict(x, i%R, (i/R)%R)
				i++
			}); a != 0 {
				t.Errorf("Predict: %v allocations per call", a)
			}
		})
	}
}

// Rollout workers share one net; run with -race.
func TestPredictConcurrently(t *testing.T) {
	for _, name := range []string{"harbor", "upkeep"} {
		t.Run(name, func(t *testing.T) {
			fx := getFixture(t, name)
			R := fx.m.Robots()
			want := make([]int, 0, len(fx.states)*R*R)
			for _, x := range fx.states {
				for r := range R {
					for k := range R {
						want = append(want, fx.net.Predict(x, r, k))
					}
				}
			}
			const workers = 6
			var wg sync.WaitGroup
			errs := make(chan string, workers)
			for range workers {
				wg.Add(1)
				go func() {
					defer wg.Done()
					for range 3 {
						i := 0
						for _, x := range fx.states {
							for r := range R {
								for k := range R {
									if got := fx.net.Predict(x, r, k); got != want[i] {
										errs <- name
										return
									}
									i++
								}
							}
						}
					}
				}()
			}
			wg.Wait()
			close(errs)
			for e := range errs {
				t.Errorf("%s: a concurrent Predict disagreed with the serial one", e)
			}
		})
	}
}

// BenchmarkPredict is the cost of one guess (features plus forward pass).
func BenchmarkPredict(b *testing.B) {
	for _, name := range []string{"harbor", "upkeep"} {
		b.Run(name, func(b *testing.B) {
			fx := getFixture(b, name)
			R := fx.m.Robots()
			fx.net.Predict(fx.states[0], 0, 0)
			b.ReportAllocs()
			i := 0
			for b.Loop() {
				fx.net.Predict(fx.states[i%len(fx.states)], i%R, i%R)
				i++
			}
		})
	}
}

// BenchmarkFeatures isolates the featurizer's share of a guess.
func BenchmarkFeatures(b *testing.B) {
	for _, name := range []string{"harbor", "upkeep"} {
		b.Run(name, func(b *testing.B) {
			fx := getFixture(b, name)
			R := fx.m.Robots()
			dst := make([]float64, fx.f.Size())
			b.ReportAllocs()
			i := 0
			for b.Loop() {
				fx.f.Features(fx.states[i%len(fx.states)], i%R, i%R, nil, dst)
				i++
			}
		})
	}
}

// BenchmarkPredictDefaultSize is a guess at sim train's default size (64
// hidden units; the fixture's net has 32), given predecessors' controls.
func BenchmarkPredictDefaultSize(b *testing.B) {
	for _, name := range []string{"harbor", "upkeep"} {
		fx := getFixture(b, name)
		net, _ := Train(fx.f, fx.train, TrainConfig{Seed: 1, Hidden: []int{64}, Epochs: 2})
		net.f, net.m = fx.f, fx.m
		prior := make([]int, fx.m.Robots())
		prior[0] = 0
		b.Run(name, func(b *testing.B) {
			b.ReportAllocs()
			for i := 0; i < b.N; i++ {
				net.PredictGiven(fx.states[i%len(fx.states)], 1, 1, prior)
			}
		})
	}
}
