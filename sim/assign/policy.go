package assign

import (
	"fmt"

	"baton/sim/harbor"
	"baton/sim/model"
	"baton/sim/upkeep"
)

// Wrap returns m with the assignment policy as its base policy: Base(x, r)
// is robot r's first step toward the target an optimal assignment of all
// robots to the state's targets gives it (harbor: uncollected slicks, by
// grid distance; upkeep: sites due for service, by road distance, after
// servicing the robot's own site when it is surely worn). Rollout on the
// wrapped model improves on the assignment policy as it does on any base.
func Wrap(m model.Model) (model.Model, error) {
	switch m := m.(type) {
	case *harbor.Model:
		return harborAssign{m}, nil
	case *upkeep.Model:
		return upkeepAssign{m}, nil
	}
	return nil, fmt.Errorf("assignment: no targets known for scenario %s", m.Name())
}

type harborAssign struct{ *harbor.Model }

func (h harborAssign) Base(s model.State, r int) int {
	st := s.(*harbor.State)
	w := h.Width()
	var targets []int32
	for _, c := range st.Slicks {
		if c >= 0 {
			targets = append(targets, c)
		}
	}
	if len(targets) == 0 {
		return harbor.Hold
	}
	cost := make([][]float64, len(st.Boats))
	for i, b := range st.Boats {
		cost[i] = make([]float64, len(targets))
		for j, c := range targets {
			cost[i][j] = float64(abs(int(b)%w-int(c)%w) + abs(int(b)/w-int(c)/w))
		}
	}
	to, _ := Solve(cost)
	if to[r] < 0 {
		return harbor.Hold
	}
	b, c := int(st.Boats[r]), int(targets[to[r]])
	switch dx, dy := c%w-b%w, c/w-b/w; {
	case dx > 0:
		return harbor.East
	case dx < 0:
		return harbor.West
	case dy > 0:
		return harbor.North
	case dy < 0:
		return harbor.South
	}
	return harbor.Hold
}

type upkeepAssign struct{ *upkeep.Model }

func (u upkeepAssign) Base(s model.State, r int) int {
	if u.SurelyWorn(s, r) {
		return 0 // service where it stands
	}
	pos := u.Positions(s)
	var targets []int
	for site := range u.NumSites() {
		if u.Due(s, site) {
			targets = append(targets, site)
		}
	}
	if len(targets) == 0 {
		return 0
	}
	cost := make([][]float64, len(pos))
	for i, p := range pos {
		cost[i] = make([]float64, len(targets))
		for j, t := range targets {
			cost[i][j] = float64(u.Distance(p, t))
		}
	}
	to, _ := Solve(cost)
	if to[r] < 0 {
		return 0
	}
	return u.Toward(pos[r], targets[to[r]])
}

func abs(x int) int {
	if x < 0 {
		return -x
	}
	return x
}
