// Package view is the fleet's picture in the browser: the live view the
// coordinator serves (--http, /view) and the replay of a decision log
// (sim replay --view, --html). Both are one page (assets/, embedded in the
// binary: nothing comes from the internet) fed by documented JSON:
//
//	GET /view               the page
//	GET /view/site.json     Site: the fleet, its scenario and its map
//	GET /view/frames.json   []Frame: the rounds kept (live: the last Keep;
//	                        replay: all of them); ?since=N: rounds after N
//	GET /view/events        server-sent events, one "frame" event (a Frame)
//	                        per round as it is filed (live only)
//
// A Frame is built from a decision-log record (clock.Record) and the
// scenario's drawing (model.Drawer), so the live view and a replay of the
// same log draw the same thing.
package view

import (
	"errors"
	"fmt"
	"slices"

	"baton/coordinator/clock"
	"baton/sim/model"
)

// Site is what does not change during a run.
type Site struct {
	Fleet    string    `json:"fleet"`
	Scenario string    `json:"scenario"`
	Robots   int       `json:"robots"`
	Map      model.Map `json:"map"`
	// Mode is "live" or "replay"; Source names the replayed log.
	Mode   string `json:"mode"`
	Source string `json:"source,omitempty"`
	// Summary is the replayed run's summary (sim replay's), shown beside.
	Summary any `json:"summary,omitempty"`
}

// Frame is one round as the view draws it.
type Frame struct {
	Epoch uint64 `json:"epoch"`
	Round uint64 `json:"round"`
	Mode  string `json:"mode"`
	// Order is the round's turn order (robot ids).
	Order  []int        `json:"order"`
	Robots []Robot      `json:"robots"`
	Items  []model.Item `json:"items"`
	// LatencyMs: from the round's start to its last decision (or close).
	LatencyMs float64 `json:"latency_ms"`
	// StageCost is the coordinator's stage cost of the round.
	StageCost float64 `json:"stage_cost"`
	// Guessed counts robots that decided with at least one guess; Held
	// robots without a decision.
	Guessed int `json:"guessed"`
	Held    int `json:"held"`
}

// Robot is one robot in a frame.
type Robot struct {
	Robot int         `json:"robot"`
	At    model.Point `json:"at"`
	// To is where its control takes it (At when it stays or holds).
	To      model.Point `json:"to"`
	Control int         `json:"control"`
	// Action names the control; "" when it held.
	Action string `json:"action"`
	// Turn is its place in the order (0 first; -1: not in this round).
	Turn int `json:"turn"`
	// Held: no decision this round (it stays); Why says why.
	Held bool   `json:"held"`
	Why  string `json:"why,omitempty"`
	// Heard and Guessed are the predecessors whose decisions it used as
	// heard and as guessed.
	Heard   []int `json:"heard"`
	Guessed []int `json:"guessed"`
}

// NewSite describes fleet's scenario m; errors if m cannot be drawn.
func NewSite(fleet string, m model.Fleet) (Site, error) {
	d, ok := m.(model.Drawer)
	if !ok {
		return Site{}, fmt.Errorf("scenario %s cannot be drawn (no model.Drawer)", m.Name())
	}
	return Site{Fleet: fleet, Scenario: m.Name(), Robots: m.Robots(), Map: d.Map(), Mode: "live"}, nil
}

// FrameOf draws one decision-log record.
func FrameOf(m model.Fleet, rec clock.Record) (Frame, error) {
	d, ok := m.(model.Drawer)
	if !ok {
		return Frame{}, fmt.Errorf("scenario %s cannot be drawn", m.Name())
	}
	if rec.Snapshot == nil {
		return Frame{}, errors.New("no state in the record")
	}
	x := m.NewState()
	if err := m.Unflatten(x, rec.Snapshot.Ints, rec.Snapshot.Reals); err != nil {
		return Frame{}, fmt.Errorf("round %d: state: %w", rec.Round, err)
	}
	n := m.Robots()
	if len(rec.Controls) != n {
		return Frame{}, fmt.Errorf("round %d: %d controls for %d robots", rec.Round, len(rec.Controls), n)
	}
	f := Frame{Epoch: rec.Epoch, Round: rec.Round, Mode: rec.Mode, Order: orEmpty(rec.Order), Items: orEmptyItems(d.Items(x)),
		LatencyMs: float64(rec.LatencyUs) / 1000, StageCost: rec.Stage, Held: len(rec.Held)}
	names, _ := m.(model.ControlNamer)
	for r := range n {
		c := rec.Controls[r]
		if c < 0 || c >= m.NumControls(x, r) {
			return Frame{}, fmt.Errorf("round %d: robot %d: control %d out of range", rec.Round, r, c)
		}
		rb := Robot{Robot: r, At: d.Spot(x, r), Control: c, Turn: slices.Index(rec.Order, r), Heard: []int{}, Guessed: []int{}}
		rb.Held = slices.Contains(rec.Held, r)
		if rb.Held {
			c = 0
			rb.Control = 0
			rb.Why = heldWhy(rec, r)
		}
		rb.To = d.Aim(x, r, c)
		switch {
		case rb.Held: // nothing to do: no action is named beside it
		case names != nil:
			rb.Action = names.ControlName(x, r, c)
		default:
			rb.Action = fmt.Sprintf("control %d", c)
		}
		for _, dec := range rec.Decisions {
			if dec.Robot == r {
				for _, h := range dec.Heard {
					rb.Heard = append(rb.Heard, int(h))
				}
				for _, g := range dec.Guessed {
					rb.Guessed = append(rb.Guessed, int(g))
				}
			}
		}
		if len(rb.Guessed) > 0 {
			f.Guessed++
		}
		f.Robots = append(f.Robots, rb)
	}
	return f, nil
}

// heldWhy says why robot r had no decision.
func heldWhy(rec clock.Record, r int) string {
	switch {
	case !slices.Contains(rec.Order, r):
		return "not in this round's order (gossip has it gone)"
	case rec.Stalled != nil && *rec.Stalled == r:
		return "no decision by its deadline: the sequential round stalled on it"
	case rec.Stalled != nil && slices.Index(rec.Order, r) > slices.Index(rec.Order, *rec.Stalled):
		return fmt.Sprintf("waited for robot %d, which stalled the sequential round", *rec.Stalled)
	}
	return "no decision by its deadline (slow, cut off, or just gone)"
}

func orEmpty(s []int) []int {
	if s == nil {
		return []int{}
	}
	return s
}

func orEmptyItems(s []model.Item) []model.Item {
	if s == nil {
		return []model.Item{}
	}
	return s
}
