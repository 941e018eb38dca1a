package vfleet

import (
	"fmt"
	"testing"

	"baton/agentd/decide"
)

// BenchmarkFleet is rounds of whole virtual fleets at the default effort
// (16 samples, horizon 20): rounds/s, and the share of the time that is
// rollout compute rather than the protocol, the wire and the queue.
//
//	go test -run XXX -bench Fleet ./sim/vfleet
func BenchmarkFleet(b *testing.B) {
	for _, sc := range []string{"harbor", "upkeep"} {
		for _, m := range []int{6, 50} {
			b.Run(fmt.Sprintf("%s/%d", sc, m), func(b *testing.B) {
				cfg := fleetConfig(b, sc, m, 1)
				cfg.Clock.Decide = decide.DefaultConfig()
				f, err := New(cfg)
				if err != nil {
					b.Fatal(err)
				}
				if _, err := f.Run(1, nil); err != nil { // gathering and round 1
					b.Fatal(err)
				}
				b.ReportAllocs()
				c0 := f.ComputeTime()
				b.ResetTimer()
				if _, err := f.Run(b.N, nil); err != nil {
					b.Fatal(err)
				}
				b.StopTimer()
				secs := b.Elapsed().Seconds()
				b.ReportMetric(float64(b.N)/secs, "rounds/s")
				b.ReportMetric((f.ComputeTime()-c0).Seconds()/secs, "compute-share")
			})
		}
	}
}
