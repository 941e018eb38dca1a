package turn

import (
	"testing"
	"time"
)

func TestLinkEWMA(t *testing.T) {
	l := NewLinkMonitor(0.5, 4, 0.95)
	if l.EWMA() != 0 || l.Quantile() != 0 || l.Samples() != 0 {
		t.Fatal("empty monitor not zero")
	}
	// By hand, alpha 0.5: 10 -> 10; 20 -> 15; 40 -> 27.5; 0 -> 13.75 (ms).
	want := []time.Duration{10 * time.Millisecond, 15 * time.Millisecond, 27500 * time.Microsecond, 13750 * time.Microsecond}
	for i, d := range []time.Duration{10, 20, 40, 0} {
		l.Observe(d * time.Millisecond)
		if got := l.EWMA(); got != want[i] {
			t.Errorf("after %d samples: EWMA %v want %v", i+1, got, want[i])
		}
	}
	// Default alpha 0.2: 100 then 200 -> 0.2*200 + 0.8*100 = 120.
	var z LinkMonitor
	z.Observe(100 * time.Microsecond)
	z.Observe(200 * time.Microsecond)
	if got := z.EWMA(); got != 120*time.Microsecond {
		t.Errorf("zero-value EWMA %v", got)
	}
	z.Observe(-time.Second) // counted as 0: 0.8*120 = 96
	if got := z.EWMA(); got != 96*time.Microsecond {
		t.Errorf("negative sample: EWMA %v", got)
	}
}

func TestLinkQuantile(t *testing.T) {
	l := NewLinkMonitor(0, 0, 0) // defaults: window 64, p95
	// 1..100 ms: only the last 64 (37..100) stay; nearest rank of p95 over
	// 64 samples is ceil(60.8) = 61st smallest = 37+60 = 97 ms.
	for i := 1; i <= 100; i++ {
		l.Observe(time.Duration(i) * time.Millisecond)
	}
	if l.Samples() != 64 {
		t.Fatalf("samples %d", l.Samples())
	}
	if got := l.Quantile(); got != 97*time.Millisecond {
		t.Errorf("p95 %v want 97ms", got)
	}
	m := NewLinkMonitor(0.2, 10, 0.5)
	for _, d := range []time.Duration{9, 1, 8, 2, 7, 3, 6, 4, 5, 10} {
		m.Observe(d)
	}
	if got := m.Quantile(); got != 5 {
		t.Errorf("median %v want 5", got)
	}
	// Observing out of order did not disturb the window (Quantile sorts a copy).
	m.Observe(100) // evicts 9
	if got := m.Quantile(); got != 5 {
		t.Errorf("median after evicting 9: %v want 5", got)
	}
}

func TestLinkSuggest(t *testing.T) {
	l := NewLinkMonitor(0.2, 8, 0.95)
	for range 8 {
		l.Observe(2 * time.Millisecond)
	}
	// 4 robots x (2 + 3) ms = 20 ms: fits a 20 ms period, not a 19 ms one.
	if got := l.Suggest(4, 3*time.Millisecond, 20*time.Millisecond); got != Hybrid {
		t.Errorf("fast links: %v", got)
	}
	if got := l.Suggest(4, 3*time.Millisecond, 19*time.Millisecond); got != Parallel {
		t.Errorf("just too slow: %v", got)
	}
	// One slow hop moves p95, not the EWMA much; the rule follows p95.
	l.Observe(30 * time.Millisecond)
	if got := l.Suggest(4, 3*time.Millisecond, 100*time.Millisecond); got != Parallel {
		t.Errorf("slow link: %v (p95 %v)", got, l.Quantile())
	}
	if got := l.Suggest(4, 3*time.Millisecond, 0); got != Hybrid {
		t.Errorf("no period: %v", got)
	}
	if got := l.Suggest(1<<62, time.Duration(1<<62), time.Hour); got != Parallel {
		t.Errorf("huge: %v", got)
	}
}
