package node

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"time"

	"baton/agentd/turn"
	"baton/sim/model"
)

// View is what the robot's own software sees of a round (the local
// interface's JSON).
type View struct {
	Round   uint64   `json:"round"`
	Epoch   uint64   `json:"epoch"`
	Control int      `json:"control"`
	Action  string   `json:"action"`
	Hold    bool     `json:"hold"`
	Reason  string   `json:"reason,omitempty"`
	Heard   []uint32 `json:"heard"`
	Guessed []uint32 `json:"guessed"`
	Decided bool     `json:"decided"`
	Closed  bool     `json:"closed"`
	// RoundLatencyUs is the coordinator's measure of the whole round, once
	// closed (also when this robot held).
	RoundLatencyUs uint64 `json:"round_latency_us,omitempty"`
	// StalledBy: the robot a sequential round waited for in vain.
	StalledBy *int `json:"stalled_by,omitempty"`
}

// MarshalJSON leaves control and action out of a hold: software that reads
// only "action" must find nothing to do when there is no valid decision.
func (v View) MarshalJSON() ([]byte, error) {
	type plain View
	if !v.Hold {
		return json.Marshal(plain(v))
	}
	return json.Marshal(struct {
		plain
		Control *int    `json:"control,omitempty"`
		Action  *string `json:"action,omitempty"`
	}{plain: plain(v)})
}

func viewOf(v turn.View) View {
	out := View{Round: v.Round, Epoch: v.Epoch, Control: v.Control, Action: v.Action, Hold: v.Hold, Reason: v.Reason,
		Heard: v.Heard, Guessed: v.Guessed, Decided: v.Decided, Closed: v.Closed, RoundLatencyUs: v.LatencyUs}
	if v.Stalled >= 0 {
		s := v.Stalled
		out.StalledBy = &s
	}
	return out
}

// Decision returns the view of round r (0: the current round), waiting up
// to wait for it to be decided (or closed, with closed set). A robot with
// nothing valid holds: the view says so and why.
func (n *Node) Decision(ctx context.Context, r uint64, wait time.Duration, closed bool) View {
	deadline := time.NewTimer(wait)
	defer deadline.Stop()
	for {
		v, ch := n.view(r, closed, false)
		if v.Done {
			return viewOf(v)
		}
		select {
		case <-ch:
			continue
		case <-ctx.Done():
		case <-deadline.C:
		}
		v, _ = n.view(r, closed, true)
		return viewOf(v)
	}
}

// view reads the machine's view and the channel that signals its next
// change. final: the wait is over, so a view that is not done holds. Nothing
// is served as something to do while this robot cannot hear the fleet.
func (n *Node) view(r uint64, closed, final bool) (turn.View, chan struct{}) {
	n.mu.Lock()
	defer n.mu.Unlock()
	v := n.machine.View(n.now(), r, closed)
	switch {
	case v.Done && !v.Hold && !n.bus.Connected():
		v.Hold, v.Reason = true, "lost contact with NATS: no current decision"
	case !v.Done && final:
		v.Hold = true // out of time: hold, for the reason the machine gives
	default:
		return v, n.changed
	}
	v.Control, v.Action = 0, n.machine.ControlName(v.Round, 0)
	return v, n.changed
}

// Report is an observation from the robot's own software.
type Report struct {
	Round    uint64           `json:"round"`
	Position int32            `json:"position"`
	Applied  int              `json:"applied"`
	Seen     []model.Sighting `json:"seen"`
}

// ErrBadReport wraps reports the machine refuses.
var ErrBadReport = errors.New("bad observation")

// Observe checks a report from the robot's software and sends it to the
// coordinator; the machine keeps it to re-send when a coordinator asks.
func (n *Node) Observe(rep Report) error {
	n.mu.Lock()
	acts, err := n.machine.Observe(n.now(), rep.Round, rep.Position, rep.Applied, rep.Seen)
	n.mu.Unlock()
	if err != nil {
		return fmt.Errorf("%w: %v", ErrBadReport, err)
	}
	n.apply(acts)
	return nil
}

// Health says whether this robot can act on rounds now, and why not.
func (n *Node) Health() (bool, string) {
	if !n.bus.Connected() {
		return false, "not connected to NATS: " + n.bus.Status()
	}
	n.mu.Lock()
	defer n.mu.Unlock()
	return n.machine.Health(n.now())
}

// Round is the current round (0 before any).
func (n *Node) Round() uint64 {
	n.mu.Lock()
	defer n.mu.Unlock()
	return n.machine.Round()
}
