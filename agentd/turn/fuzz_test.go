package turn

import (
	"testing"
	"time"
)

// FuzzSteps drives robot 1 of four with an arbitrary sequence of events
// built from the input (round starts of any run and round, decisions,
// closes, report requests, timers, computed controls) and checks what must
// always hold: no panic, every published control valid for its round,
// bounded memory, and drops that say why. The seeds run in plain go test.
func FuzzSteps(f *testing.F) {
	f.Add([]byte{0, 7, 5, 3, 1, 0, 5, 0, 1, 4, 7, 5, 1, 2, 1})
	f.Add([]byte{0, 7, 5, 1, 5, 7, 5, 2, 0, 0, 7, 6, 2, 0, 250, 0})
	f.Add([]byte{0, 1, 200, 3, 0, 0, 1, 1, 3, 0, 1, 2, 3, 0, 1, 3, 3, 2, 7, 5, 1, 2})
	f.Add([]byte{3, 9, 0, 7, 5, 1, 1, 0, 7, 5, 2, 4, 9, 9, 9})
	f.Fuzz(func(t *testing.T, data []byte) {
		r := newRig(t)
		now := time.Duration(0)
		next := func() byte {
			if len(data) == 0 {
				return 0
			}
			b := data[0]
			data = data[1:]
			return b
		}
		for steps := 0; len(data) > 0 && steps < 200; steps++ {
			now += time.Duration(next()) * time.Millisecond
			var ev Event
			switch next() % 6 {
			case 0:
				s := r.start(uint64(next()), uint64(next()), Mode(next()%4))
				if b := next(); b&1 == 1 {
					s.Order, s.DeadlinesUs = []uint32{uint32(b>>1) % 5, 1}, []uint64{uint64(next()) * 1000, 300e3}
				}
				ev = GotStart{Now: now, Msg: s}
			case 1:
				d := dec(uint64(next()), uint64(next()), uint32(next()%5), int32(int8(next())))
				ev = GotDecision{Now: now, Subject: int(next() % 5), Msg: d}
			case 2:
				c := Close{Fleet: fleet, Epoch: uint64(next()), Round: uint64(next()), Controls: []int32{int32(next() % 6), 0, 1, 2}}
				if b := next(); b < 8 {
					c.Held = []uint32{uint32(b % 5)}
				}
				ev = GotClose{Now: now, Msg: c}
			case 3:
				ev = GotHello{Now: now, Msg: Hello{Fleet: fleet, Epoch: uint64(next())}}
			case 4:
				ev = Timer{Now: now, Epoch: r.m.Epoch(), Round: uint64(next())}
			default:
				ev = Computed{Now: now, Epoch: r.m.Epoch(), Round: r.m.Round(), Control: int(int8(next()))}
			}
			for _, a := range r.step(ev) {
				if p, ok := a.(Publish); ok {
					ent := r.m.hist[p.Decision.Round]
					if ent == nil || p.Decision.Control < 0 || int(p.Decision.Control) >= ent.controls[1] {
						t.Fatalf("published %+v", p.Decision)
					}
				}
			}
			if len(r.m.hist) > History {
				t.Fatalf("memory grew: %d rounds kept", len(r.m.hist))
			}
			v := r.m.View(now, 0, false)
			if !v.Hold && (v.Control < 0 || v.Control > 4) {
				t.Fatalf("served %+v", v)
			}
		}
	})
}
