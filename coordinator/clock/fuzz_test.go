package clock

import (
	"slices"
	"testing"
	"time"

	"baton/agentd/turn"
)

// FuzzClock drives a 3-robot coordinator with an arbitrary sequence of
// events (decisions and reports of any run and round, membership, ticks)
// and checks what must always hold: rounds start in order, with live
// robots in the order and rising deadlines; closes carry valid controls.
func FuzzClock(f *testing.F) {
	f.Add([]byte{1, 0, 0, 0, 1, 1, 0, 0, 1, 2, 0, 0, 0, 0, 1, 1, 0, 0, 1, 1})
	f.Add([]byte{2, 7, 1, 0, 0, 0, 1, 3, 0, 5, 5, 5, 5, 4, 255, 255})
	f.Add([]byte{3, 3, 3, 3, 1, 0, 1, 0, 0, 1, 1, 9, 1, 2, 2, 3, 1})
	f.Fuzz(func(t *testing.T, data []byte) {
		cfg := config(t, 3)
		cfg.Mode = turn.Mode(1 + len(data)%3)
		r := newRig(t, cfg)
		next := func() byte {
			if len(data) == 0 {
				return 0
			}
			b := data[0]
			data = data[1:]
			return b
		}
		r.step(Begin{Now: 0})
		var round uint64
		alive := []int{0, 1, 2}
		for steps := 0; len(data) > 0 && steps < 300; steps++ {
			r.now += time.Duration(next()) * 10 * time.Millisecond
			var acts []Action
			switch next() % 4 {
			case 0:
				rb := int(next() % 4)
				acts = r.step(GotDecision{Now: r.now, Subject: rb, Msg: turn.Decision{Fleet: "yard", Epoch: epoch + uint64(next()%2),
					Round: uint64(next() % 4), Robot: uint32(rb), Control: int32(int8(next()))}})
			case 1:
				rb := int(next() % 4)
				acts = r.step(GotReport{Now: r.now, Subject: rb, Msg: turn.Report{Fleet: "yard", Epoch: epoch - uint64(next()%2),
					Round: uint64(next() % 4), Robot: uint32(rb), Position: int32(next()), Applied: int32(next() % 6)}})
			case 2:
				alive = alive[:0]
				b := next()
				for i := range 3 {
					if b&(1<<i) != 0 {
						alive = append(alive, i)
					}
				}
				acts = r.step(Members{Now: r.now, Alive: alive})
			default:
				acts = r.step(Tick{Now: r.now})
			}
			for _, a := range acts {
				switch a := a.(type) {
				case SendStart:
					s := a.Msg
					if s.Round != round+1 || len(s.Order) == 0 || len(s.Order) != len(s.DeadlinesUs) {
						t.Fatalf("round %d after %d: %+v", s.Round, round, s)
					}
					round = s.Round
					for k, rb := range s.Order {
						if !slices.Contains(alive, int(rb)) || (k > 0 && s.DeadlinesUs[k] <= s.DeadlinesUs[k-1]) {
							t.Fatalf("order %v deadlines %v with %v alive", s.Order, s.DeadlinesUs, alive)
						}
					}
				case SendClose:
					if a.Msg.Round != round || len(a.Msg.Controls) != 3 {
						t.Fatalf("%+v", a.Msg)
					}
					for _, u := range a.Msg.Controls {
						if u < 0 || u > 4 {
							t.Fatalf("%+v", a.Msg)
						}
					}
				}
			}
		}
	})
}
