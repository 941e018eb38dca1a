package upkeep

import "baton/sim/model"

var _ model.Drawer = (*Model)(nil)

// Map is the site graph at the sites' coordinates.
func (m *Model) Map() model.Map {
	mp := model.Map{Kind: "graph"}
	for s, name := range m.names {
		mp.Places = append(mp.Places, model.Place{Name: name, X: m.xy[s][0], Y: m.xy[s][1]})
	}
	for a, nb := range m.nbr {
		for _, b := range nb {
			if a < b {
				mp.Links = append(mp.Links, [2]int{a, b})
			}
		}
	}
	return mp
}

// Items are the sites with the belief of their wear: Value is the expected
// level over L, Alarm that the chance of being at or past the threshold
// level is above the threshold probability (the base policy's trigger).
func (m *Model) Items(s model.State) []model.Item {
	st := s.(*State)
	out := make([]model.Item, m.n)
	for site := range m.n {
		bel := m.belief(st, site)
		mean, over := 0.0, 0.0
		for lvl, p := range bel {
			mean += float64(lvl) * p
			if lvl >= m.threshLevel {
				over += p
			}
		}
		out[site] = model.Item{Kind: "site", X: m.xy[site][0], Y: m.xy[site][1], Value: mean / float64(m.levels),
			Alarm: over > m.threshProb, Label: m.names[site]}
	}
	return out
}

// Spot is robot r's site.
func (m *Model) Spot(s model.State, r int) model.Point {
	p := m.xy[s.(*State).pos[r]]
	return model.Point{X: p[0], Y: p[1]}
}

// Aim is the site control c takes robot r to (its own for service).
func (m *Model) Aim(s model.State, r, c int) model.Point {
	at := s.(*State).pos[r]
	if nb := m.nbr[at]; c >= 1 && c <= len(nb) {
		at = nb[c-1]
	}
	p := m.xy[at]
	return model.Point{X: p[0], Y: p[1]}
}
