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
// The wrapped model is a model.JointBaser: one solve serves every robot.
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
	u := make([]int, h.Robots())
	h.BaseAll(s, u)
	return u[r]
}

func (h harborAssign) BaseAll(s model.State, u []int) {
	st := s.(*harbor.State)
	var targets []int32
	for _, c := range st.Slicks {
		if c >= 0 {
			targets = append(targets, c)
		}
	}
	if len(targets) == 0 {
		for r := range u {
			u[r] = harbor.Hold
		}
		return
	}
	cost := make([][]float64, len(st.Boats))
	for i, b := range st.Boats {
		cost[i] = make([]float64, len(targets))
		for j, c := range targets {
			cost[i][j] = float64(h.Distance(b, c))
		}
	}
	to, _ := Solve(cost)
	for r := range u {
		u[r] = harbor.Hold
		if to[r] >= 0 {
			u[r] = h.Toward(st.Boats[r], targets[to[r]])
		}
	}
}

type upkeepAssign struct{ *upkeep.Model }

func (k upkeepAssign) Base(s model.State, r int) int {
	u := make([]int, k.Robots())
	k.BaseAll(s, u)
	return u[r]
}

func (k upkeepAssign) BaseAll(s model.State, u []int) {
	pos := k.Positions(s)
	targets := k.DueSites(s, nil)
	var to []int
	if len(targets) > 0 {
		cost := make([][]float64, len(pos))
		for i, p := range pos {
			cost[i] = make([]float64, len(targets))
			for j, t := range targets {
				cost[i][j] = float64(k.Distance(p, t))
			}
		}
		to, _ = Solve(cost)
	}
	for r := range u {
		switch {
		case k.SurelyWorn(s, r):
			u[r] = 0 // service where it stands
		case to == nil || to[r] < 0:
			u[r] = 0
		default:
			u[r] = k.Toward(pos[r], targets[to[r]])
		}
	}
}
