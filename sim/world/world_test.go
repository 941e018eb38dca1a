package world

import (
	"math"
	"strings"
	"testing"

	"baton/sim/harbor"
	"baton/sim/upkeep"
)

// A world that keeps upkeep's hidden wear charges true stage costs whose
// mean is the belief's expected cost (the belief is exact, so the
// expectation is the true cost's conditional mean), robots report the true
// level of their site, and the belief they decide on holds it.
func TestTrueWear(t *testing.T) {
	m, err := upkeep.Default(4)
	if err != nil {
		t.Fatal(err)
	}
	// Episodes are independent; rounds within one are not (an unwatched
	// site's wear persists), so the spread is taken across episodes.
	const episodes, rounds = 300, 60
	var sum, sumSq, trueTotal, expTotal float64
	u := make([]int, m.Robots())
	for e := range episodes {
		w, err := NewTrue(m, uint64(1000+e))
		if err != nil {
			t.Fatal(err)
		}
		for range rounds {
			for r := range u {
				u[r] = m.Base(w.Y, r)
			}
			w.Apply(u)
			for r := range u {
				pos, seen := w.Report(r)
				if len(seen) != 1 || seen[0].What != pos || seen[0].Value != w.truth[pos] {
					t.Fatalf("robot %d at %d reports %v; the truth there is %d", r, pos, seen, w.truth[pos])
				}
				if got, ok := m.PointLevel(w.Y, int(pos)); !ok || got != int(w.truth[pos]) {
					t.Fatalf("the belief at robot %d's site %d is not the true level %d", r, pos, w.truth[pos])
				}
			}
		}
		d := w.TrueCost - w.Cost
		sum, sumSq = sum+d, sumSq+d*d
		trueTotal, expTotal = trueTotal+w.TrueCost, expTotal+w.Cost
	}
	mean := sum / episodes
	se := math.Sqrt((sumSq/episodes - mean*mean) / episodes)
	if math.Abs(mean) > 4*se {
		t.Fatalf("true minus expected cost averages %.2f per episode (standard error %.2f): not the same on average", mean, se)
	}
	t.Logf("per episode of %d rounds: true %.1f, expected %.1f; difference %.2f ± %.2f (standard error)", rounds,
		trueTotal/episodes, expTotal/episodes, mean, se)
	h, _ := harbor.Default(2)
	if _, err := NewTrue(h, 1); err == nil || !strings.Contains(err.Error(), "no hidden truth") {
		t.Fatalf("harbor: %v", err)
	}
}
