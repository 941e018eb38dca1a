package delivery

import (
	"fmt"

	"baton/sim/model"
)

var _ model.Drawer = (*Model)(nil)

// Map is the road graph at the stations' coordinates.
func (m *Model) Map() model.Map {
	mp := model.Map{Kind: "graph"}
	for s, name := range m.names {
		mp.Places = append(mp.Places, model.Place{Name: name, X: m.xy[s][0], Y: m.xy[s][1]})
	}
	for a, nb := range m.nbr {
		for _, b := range nb {
			if int32(a) < b {
				mp.Links = append(mp.Links, [2]int{a, int(b)})
			}
		}
	}
	return mp
}

// parcelStep spreads the parcels at one station along a short row, so
// several can be told apart (and hovered) in the view.
const parcelStep = 0.18

// Items are the parcels: a waiting one at its station (Alarm: it waits
// where no robot is), one on board at its robot's station; the label says
// where it goes.
func (m *Model) Items(x model.State) []model.Item {
	s := x.(*State)
	n := int32(m.n)
	var out []model.Item
	var here [MaxStations]int // parcels drawn at each station so far
	for i, a := range s.At {
		if a < 0 {
			continue
		}
		at, label, alarm := a, "", false
		if a < n {
			label = fmt.Sprintf("parcel %d for %s, waiting at %s", i, m.names[s.To[i]], m.names[a])
			alarm = true
			for _, p := range s.Pos {
				alarm = alarm && p != a
			}
		} else {
			r := a - n
			at = s.Pos[r]
			label = fmt.Sprintf("parcel %d for %s, on robot %d", i, m.names[s.To[i]], r)
		}
		k := here[at]
		here[at]++
		out = append(out, model.Item{Kind: "parcel", X: m.xy[at][0] + parcelStep*float64(k+1), Y: m.xy[at][1] - parcelStep,
			Value: 1, Alarm: alarm, Label: label})
	}
	return out
}

// Spot is robot r's station.
func (m *Model) Spot(x model.State, r int) model.Point { return m.point(x.(*State).Pos[r]) }

// Aim is the station control c takes robot r to (its own for stay or an
// invalid control).
func (m *Model) Aim(x model.State, r, c int) model.Point {
	return m.point(m.move(x.(*State).Pos[r], c))
}

func (m *Model) point(s int32) model.Point { return model.Point{X: m.xy[s][0], Y: m.xy[s][1]} }
