package episode

import (
	"math"
	"testing"
)

// Student's t 97.5% quantile with 9 degrees of freedom is 2.262 (standard
// t tables, e.g. NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.6.7.2).
func TestMeanCI95(t *testing.T) {
	xs := []float64{1, 2, 3, 4, 5, 6, 7, 8, 9, 10}
	mean, half := MeanCI95(xs)
	sd := math.Sqrt(82.5 / 9) // sample sd of 1..10
	if mean != 5.5 || math.Abs(half-2.262*sd/math.Sqrt(10)) > 1e-3 {
		t.Fatalf("mean %g half %g", mean, half)
	}
	if _, h := MeanCI95([]float64{3}); h != 0 {
		t.Fatal("one sample has no interval")
	}
}

// The delta-method interval of a ratio of paired means: exact when a is a
// multiple of b (a - R·b has no variance), wider as they decouple.
func TestRatioCI95(t *testing.T) {
	r, h := RatioCI95([]float64{1, 2, 3}, []float64{2, 4, 6})
	if r != 0.5 || h != 0 {
		t.Fatalf("%v ± %v", r, h)
	}
	r, h = RatioCI95([]float64{1, 3, 2, 4}, []float64{2, 4, 6, 8})
	if r != 0.5 || !(h > 0) {
		t.Fatalf("%v ± %v", r, h)
	}
	if _, h := RatioCI95([]float64{1}, []float64{2}); !math.IsNaN(h) {
		t.Fatal("one pair has no interval")
	}
}
