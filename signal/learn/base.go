package learn

import "baton/sim/model"

// learnedBase is implemented by AsBase's wrappers.
type learnedBase interface{ inner() model.Model }

// withNet is m with its base policy replaced by the net. Embedding the
// Model interface promotes only Model's methods, so the wrapper does not
// claim Enumerable or Fleet: exact solvers and the fleet runtime keep
// talking to the scenario itself.
type withNet struct {
	model.Model
	net *Net
}

func (b *withNet) Base(x model.State, r int) int { return b.net.Predict(x, r, r) }
func (b *withNet) inner() model.Model            { return b.Model }

type withNetTC struct {
	*withNet
	tc model.TerminalCoster
}

func (b withNetTC) TerminalCost(s model.State) float64 { return b.tc.TerminalCost(s) }

type withNetCN struct {
	*withNet
	cn model.ControlNamer
}

func (b withNetCN) ControlName(s model.State, r, c int) string { return b.cn.ControlName(s, r, c) }

type withNetTCCN struct {
	*withNet
	tc model.TerminalCoster
	cn model.ControlNamer
}

func (b withNetTCCN) TerminalCost(s model.State) float64         { return b.tc.TerminalCost(s) }
func (b withNetTCCN) ControlName(s model.State, r, c int) string { return b.cn.ControlName(s, r, c) }

// AsBase returns m with Base(x, r) = n.Predict(x, r, r): the imitation of
// rollout as the next base policy (position k = r, the default order). The
// optional TerminalCoster and ControlNamer of m carry through, since
// rollout uses them. A net from Train, Check or Load keeps the scenario
// instance it was bound to (pass the same m); one from Unmarshal is bound
// to m first. AsBase panics when n cannot serve m (another scenario or
// shape), which is a programming error: check files with Check or Load.
func AsBase(m model.Model, n *Net) model.Model {
	if lb, ok := m.(learnedBase); ok {
		m = lb.inner() // replace the previous iteration's base, do not stack
	}
	if n.f == nil || n.f.Scenario() != m.Name() {
		bound, err := n.boundTo(m)
		if err != nil {
			panic("learn: AsBase: " + err.Error())
		}
		n = bound
	}
	w := &withNet{Model: m, net: n}
	tc, hasTC := m.(model.TerminalCoster)
	cn, hasCN := m.(model.ControlNamer)
	switch {
	case hasTC && hasCN:
		return withNetTCCN{w, tc, cn}
	case hasTC:
		return withNetTC{w, tc}
	case hasCN:
		return withNetCN{w, cn}
	}
	return w
}
