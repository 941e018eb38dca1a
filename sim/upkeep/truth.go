package upkeep

import (
	"math/rand/v2"

	"baton/sim/model"
)

var _ model.Truther = (*Model)(nil)

// DrawTruth draws each site's true wear level from its belief.
func (m *Model) DrawTruth(s model.State, rng *rand.Rand) []int32 {
	st := s.(*State)
	out := make([]int32, m.n)
	for site := range m.n {
		out[site] = int32(m.sample(m.belief(st, site), rng.Float64()))
	}
	return out
}

// TrueStep services the sites of robots with control 0, charges the true
// levels' cost (after servicing, before wear, as Advance does for the
// belief), then wears every site one step along its chain: one uniform per
// site.
func (m *Model) TrueStep(truth []int32, s model.State, u []int, rng *rand.Rand) float64 {
	st := s.(*State)
	for r, c := range u {
		if c == 0 {
			truth[st.pos[r]] = 0
		}
	}
	cost := 0.0
	for site, l := range truth {
		cost += m.cost[l]
		row := m.chain[(site*m.k+int(l))*m.k : (site*m.k+int(l)+1)*m.k]
		truth[site] = int32(m.sample(row, rng.Float64()))
	}
	return cost
}

// TrueSense is the true level of the site robot r stands on (every site,
// for an instance that observes all).
func (m *Model) TrueSense(truth []int32, s model.State, r int, dst []model.Sighting) []model.Sighting {
	st := s.(*State)
	if m.observeAll {
		for site, l := range truth {
			dst = append(dst, model.Sighting{What: int32(site), Value: l})
		}
		return dst
	}
	at := st.pos[r]
	return append(dst, model.Sighting{What: int32(at), Value: truth[at]})
}

// PointLevel is site's level when the belief in s is certain of it.
func (m *Model) PointLevel(s model.State, site int) (int, bool) {
	st := s.(*State)
	return pointLevel(m.belief(st, site))
}

// Toward is the control that moves a robot at site a one road toward site
// b on a shortest path (0 when a is b).
func (m *Model) Toward(a, b int) int { return m.hop[a*m.n+b] }

// Due reports whether site is due for service in s as the base policy
// sees it: the chance it is at or past the threshold level exceeds the
// threshold probability.
func (m *Model) Due(s model.State, site int) bool {
	return m.tail(s.(*State), site) > m.threshProb
}

// DueSites appends to dst the sites due for service in s (Due), in index
// order: the targets the baselines assign and auction.
func (m *Model) DueSites(s model.State, dst []int) []int {
	st := s.(*State)
	for site := range m.n {
		if m.tail(st, site) > m.threshProb {
			dst = append(dst, site)
		}
	}
	return dst
}

// SurelyWorn reports whether robot r's site is surely not at level 0 in s
// (the base policy services it then).
func (m *Model) SurelyWorn(s model.State, r int) bool {
	st := s.(*State)
	return m.belief(st, st.pos[r])[0] == 0
}
