package turn

import (
	"encoding/binary"
	"slices"
	"testing"
	"time"

	pb "baton/proto"
)

// checkActions holds for every Step: known action types, drops explained.
func checkActions(t *testing.T, acts []Action) {
	t.Helper()
	for _, a := range acts {
		switch a := a.(type) {
		case Drop:
			switch a.Reason {
			case DropMalformed, DropForeign, DropStale, DropFuture, DropDuplicate, DropNotInOrder:
			default:
				t.Fatalf("unknown reason %q", a.Reason)
			}
			if a.Detail == "" {
				t.Fatalf("drop without detail: %+v", a)
			}
		case Arm, Compute, Publish:
		default:
			t.Fatalf("unknown action %T", a)
		}
	}
}

// FuzzHeard feeds arbitrary bytes as a decision, twice, to robot 1 of four
// in round 5 (order 0 1 2) and then lets the turn finish. The seeds run in
// plain go test.
func FuzzHeard(f *testing.F) {
	f.Add([]byte(nil))
	f.Add([]byte{0xff})
	f.Add([]byte{0x0a, 0x80})
	for _, d := range []*pb.Decision{
		dec(5, 0, 1), dec(5, 2, 4), dec(5, 3, 1), dec(6, 0, 1), dec(4, 0, 1), dec(7, 0, 1),
		dec(5, 0, 5), dec(5, 0, -1), dec(5, 1<<32-1, 0), {Fleet: "other", Round: 5},
		{Fleet: fleet, Round: 5, Robot: 1, Sender: "r1"}, {Fleet: fleet, Round: 5, Robot: 1, Sender: "x"},
		{Fleet: fleet, Round: 1<<64 - 1, Robot: 0},
	} {
		f.Add(enc(f, d))
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		m := fourRobots(t)
		drops := 0
		var computes []Compute
		for range 2 {
			acts := m.Step(Heard{Now: time.Millisecond, Data: data})
			checkActions(t, acts)
			for _, a := range acts {
				switch a := a.(type) {
				case Drop:
					drops++
				case Compute:
					computes = append(computes, a)
				case Publish, Arm:
					t.Fatalf("Heard caused %T", a)
				}
			}
		}
		if got := m.Counters().Dropped(); got != uint64(drops) {
			t.Fatalf("counted %d drops, returned %d", got, drops)
		}
		// At most one Compute, and only a decision from robot 0 can cause it.
		if len(computes) > 1 {
			t.Fatalf("%d computes", len(computes))
		}
		if len(computes) == 0 {
			acts := m.Step(Timer{Now: 10 * time.Millisecond, Round: 5})
			if len(acts) != 1 {
				t.Fatalf("timer: %#v", acts)
			}
			computes = append(computes, acts[0].(Compute))
		}
		c := computes[0]
		if len(c.Known) != 4 || c.Round != 5 {
			t.Fatalf("compute %#v", c)
		}
		acts := m.Step(Computed{Round: 5, Control: 3})
		p, ok := acts[0].(Publish)
		if len(acts) != 1 || !ok {
			t.Fatalf("computed: %#v", acts)
		}
		if got := append(slices.Clone(p.Decision.Heard), p.Decision.Guessed...); !slices.Equal(got, []uint32{0}) {
			t.Fatalf("heard+guessed %v", got)
		}
	})
}

// FuzzSteps reads the input as a script of events with arbitrary fields
// and checks that the machine never panics and never publishes twice for a
// round or for a round other than its current one.
func FuzzSteps(f *testing.F) {
	f.Add([]byte{0, 1, 3, 1, 2, 0, 1, 5, 1, 0, 2, 0, 1, 3, 1, 0, 2})
	f.Add([]byte{0, 1, 1, 3, 0, 2, 1, 1, 0, 2, 1, 1, 0, 3, 1, 2, 1, 0, 0, 2, 2, 3, 1, 1})
	f.Add([]byte{1, 0, 1, 1, 2, 0, 0, 1, 2, 3, 0, 2, 1, 0, 1, 3, 1, 4})
	f.Fuzz(func(t *testing.T, script []byte) {
		const robots = 3
		m := New(Config{Fleet: fleet, Robot: 1, Robots: robots, Sender: "r1"})
		next := func() int {
			if len(script) == 0 {
				return 0
			}
			b := script[0]
			script = script[1:]
			return int(b)
		}
		published := map[uint64]bool{}
		for steps := 0; len(script) > 0 && steps < 200; steps++ {
			var ev Event
			switch next() % 4 {
			case 0:
				n := next() % 5
				order := make([]int, n)
				for i := range order {
					order[i] = next()%(robots+1) - boolInt(next()%7 == 0)
				}
				dl := make([]time.Duration, n+next()%2)
				for i := range dl {
					dl[i] = time.Duration(next()) * time.Millisecond
				}
				ctl := make([]int, robots)
				for i := range ctl {
					ctl[i] = next() % 6
				}
				ev = Round{Now: time.Duration(steps), Round: uint64(next() % 6), Order: order, Deadlines: dl, Mode: Mode(next() % 5), Controls: ctl}
			case 1:
				d := &pb.Decision{Fleet: fleet, Round: uint64(next() % 6), Robot: uint32(next() % (robots + 2)), Control: int32(next()%8 - 1), Sender: "r" + string(rune('0'+next()%3))}
				if next()%9 == 0 {
					d.Fleet = "x"
				}
				data := enc(t, d)
				if next()%9 == 0 {
					data = binary.AppendUvarint(data[:len(data)/2], uint64(next()))
				}
				ev = Heard{Data: data}
			case 2:
				ev = Timer{Round: uint64(next() % 6)}
			case 3:
				ev = Computed{Round: uint64(next() % 6), Control: next()%7 - 1, Took: time.Duration(next())}
			}
			acts := m.Step(ev)
			checkActions(t, acts)
			for _, a := range acts {
				p, ok := a.(Publish)
				if !ok {
					continue
				}
				r := p.Decision.Round
				if r != m.Round() || published[r] {
					t.Fatalf("publish for round %d (current %d, before %v)", r, m.Round(), published[r])
				}
				published[r] = true
			}
		}
	})
}

func boolInt(b bool) int {
	if b {
		return 1
	}
	return 0
}
