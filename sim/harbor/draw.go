package harbor

import "baton/sim/model"

var _ model.Drawer = (*Model)(nil)

// Map is the grid, with the current's direction.
func (m *Model) Map() model.Map {
	return model.Map{Kind: "grid", Width: m.w, Height: m.h, Flow: m.cfg.Current}
}

// Items are the uncollected slicks.
func (m *Model) Items(s model.State) []model.Item {
	var out []model.Item
	for _, c := range s.(*State).Slicks {
		if c >= 0 {
			p := m.point(c)
			out = append(out, model.Item{Kind: "slick", X: p.X, Y: p.Y, Value: 1})
		}
	}
	return out
}

// Spot is boat r's cell.
func (m *Model) Spot(s model.State, r int) model.Point { return m.point(s.(*State).Boats[r]) }

// Aim is the cell control c moves boat r to.
func (m *Model) Aim(s model.State, r, c int) model.Point {
	if c < 0 || c >= numControls {
		c = Hold
	}
	return m.point(m.move(s.(*State).Boats[r], c))
}

func (m *Model) point(c int32) model.Point {
	return model.Point{X: float64(int(c) % m.w), Y: float64(int(c) / m.w)}
}
