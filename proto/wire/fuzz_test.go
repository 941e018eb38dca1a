package wire

import (
	"baton/sim/fuzzcheck"
	"testing"
	"time"

	"baton/agentd/decide"
	"baton/agentd/turn"
	"baton/coordinator/clock"
	"baton/sim/harbor"
	"baton/sim/model"
)

// Message kinds as the fuzzers pick them.
const (
	kindStart byte = iota
	kindDecision
	kindClose
	kindHello
	kindReport
	kinds
)

func seeds(f *testing.F) {
	mdl, _ := harbor.Default(4)
	x := mdl.NewState()
	mdl.Start(x, model.NewRNG(1).Rand)
	ints, reals := mdl.Flatten(x, nil, nil)
	start := turn.Start{Fleet: "yard", Epoch: 7, Round: 6, Sender: "coordinator", Scenario: "harbor", Ints: ints, Reals: reals,
		Order: []uint32{0, 1, 2, 3}, DeadlinesUs: []uint64{1e5, 2e5, 3e5, 4e5}, Mode: turn.Hybrid,
		Params: turn.Params{Samples: 2, Horizon: 2, Seed: 3}, Digest: "d1", Guess: "base"}
	add := func(kind byte, data []byte, err error) {
		if err != nil {
			f.Fatal(err)
		}
		f.Add(kind, data)
	}
	d, err := EncodeStart(start)
	add(kindStart, d, err)
	start.Params.Samples = 1 << 31
	d, err = EncodeStart(start)
	add(kindStart, d, err)
	start.Params.Samples, start.Round = 2, 1<<60
	d, err = EncodeStart(start)
	add(kindStart, d, err)
	for _, dec := range []turn.Decision{
		{Fleet: "yard", Epoch: 7, Round: 5, Robot: 0, Control: 1, Sender: "r0"},
		{Fleet: "yard", Epoch: 7, Round: 5, Robot: 0, Control: -99},
		{Fleet: "yard", Epoch: 7, Round: 6, Robot: 2, Control: 3, Heard: []uint32{0, 1}},
		{Fleet: "yard", Epoch: 7, Round: 5, Robot: 1 << 31},
	} {
		d, err = EncodeDecision(dec)
		add(kindDecision, d, err)
	}
	for _, c := range []turn.Close{
		{Fleet: "yard", Epoch: 7, Round: 5, Controls: []int32{1, 2, 3, 4}, Held: []uint32{}, LatencyUs: 100},
		{Fleet: "yard", Epoch: 7, Round: 5, Controls: []int32{-99, 0, 0, 0}},
		{Fleet: "yard", Epoch: 7, Round: 9, Controls: []int32{0, 0, 0, 0}, Held: []uint32{0, 0}, Stalled: 3},
	} {
		d, err = EncodeClose(c)
		add(kindClose, d, err)
	}
	d, err = EncodeHello(turn.Hello{Fleet: "yard", Epoch: 9, Sender: "coordinator"})
	add(kindHello, d, err)
	for _, r := range []turn.Report{
		{Fleet: "yard", Epoch: 7, Round: 1, Robot: 1, Position: 3, Seen: []model.Sighting{{What: 0, Value: -1}}},
		{Fleet: "yard", Round: 0, Robot: 2, Position: 99999},
	} {
		d, err = EncodeReport(r)
		add(kindReport, d, err)
	}
	// A report that is all sightings: counted before it is decoded.
	many := make([]byte, 0, 2*(turn.MaxSightings+1))
	for range turn.MaxSightings + 1 {
		many = append(many, 0x32, 0x00)
	}
	f.Add(kindReport, many)
	f.Add(kindDecision, []byte{0xff, 0xff, 0x01})
	f.Add(kindStart, []byte{})
	f.Add(kindStart, make([]byte, turn.MaxMessageBytes+1))
}

func checkAlloc(t *testing.T, what string, data []byte, n uint64) {
	t.Helper()
	if limit := uint64(AllocPerByte*len(data) + AllocFixed); n > limit {
		t.Fatalf("%s of %d bytes allocated %d bytes, over the documented %d", what, len(data), n, limit)
	}
}

// robotRig is robot 1 of 4 in round 5 of run 7, waiting for robot 0.
func robotRig(t *testing.T) *turn.Machine {
	mdl, _ := harbor.Default(4)
	x := mdl.NewState()
	mdl.Start(x, model.NewRNG(1).Rand)
	ints, reals := mdl.Flatten(x, nil, nil)
	m := turn.New(turn.Config{Fleet: "yard", Robot: 1, Model: mdl, Digest: "d1", Sender: "r1"})
	acts := m.Step(turn.GotStart{Msg: turn.Start{Fleet: "yard", Epoch: 7, Round: 5, Scenario: "harbor", Ints: ints, Reals: reals,
		Order: []uint32{0, 1, 2, 3}, DeadlinesUs: []uint64{1e5, 2e5, 3e5, 4e5}, Mode: turn.Sequential,
		Params: turn.Params{Samples: 2, Horizon: 2}, Digest: "d1"}})
	if m.Round() != 5 {
		t.Fatalf("rig did not start: %+v", acts)
	}
	return m
}

// Every message a robot receives, as its daemon receives it: decoded in
// proto/wire, admitted by the turn machine. No input panics, and decoding
// stays within the documented allocation bound.
func FuzzRobotReceives(f *testing.F) {
	seeds(f)
	f.Fuzz(func(t *testing.T, kind byte, data []byte) {
		m := robotRig(t)
		var ev turn.Event
		var err error
		n := fuzzcheck.Allocated(func() {
			switch kind % kinds {
			case kindStart:
				var s turn.Start
				s, err = Start(data)
				ev = turn.GotStart{Now: time.Millisecond, Msg: s}
			case kindDecision:
				var d turn.Decision
				d, err = Decision(data)
				ev = turn.GotDecision{Now: time.Millisecond, Subject: int(d.Robot % 5), Msg: d}
			case kindClose:
				var c turn.Close
				c, err = Close(data)
				ev = turn.GotClose{Now: time.Millisecond, Msg: c}
			default:
				var h turn.Hello
				h, err = Hello(data)
				ev = turn.GotHello{Now: time.Millisecond, Msg: h}
			}
		})
		checkAlloc(t, "decoding", data, n)
		if err != nil {
			if r := Reason(err); r != turn.DropMalformed && r != turn.DropOversize && r != turn.DropBounds {
				t.Fatalf("decode error with reason %q", r)
			}
			return
		}
		for _, a := range m.Step(ev) {
			if p, ok := a.(turn.Publish); ok && (p.Decision.Control < 0 || p.Decision.Control > 4) {
				t.Fatalf("published an impossible control: %+v", p)
			}
		}
		// However the message went, the robot still takes its turn.
		m.Step(turn.GotDecision{Now: 2 * time.Millisecond, Subject: 0, Msg: turn.Decision{Fleet: "yard", Epoch: m.Epoch(), Round: m.Round(), Robot: 0, Control: 1}})
	})
}

// coordRig is a coordinator collecting round 1 of a 4-robot fleet.
func coordRig(t *testing.T) *clock.Machine {
	mdl, _ := harbor.Default(4)
	cfg := clock.DefaultConfig()
	cfg.Fleet, cfg.Epoch, cfg.Model, cfg.Decide = "yard", 7, mdl, decide.Config{Samples: 2, Horizon: 2}
	c := clock.New(cfg)
	c.Step(clock.Begin{})
	c.Step(clock.Members{Alive: []int{0, 1, 2, 3}})
	for r := range 4 {
		c.Step(clock.GotReport{Subject: r, Msg: turn.Report{Fleet: "yard", Robot: uint32(r), Position: int32(r)}})
	}
	if c.Round() != 1 {
		t.Fatal("rig did not start round 1")
	}
	return c
}

// Every message the coordinator receives, as it receives it.
func FuzzCoordinatorReceives(f *testing.F) {
	seeds(f)
	f.Fuzz(func(t *testing.T, kind byte, data []byte) {
		c := coordRig(t)
		var ev clock.Event
		var err error
		n := fuzzcheck.Allocated(func() {
			if kind%2 == 0 {
				var d turn.Decision
				d, err = Decision(data)
				ev = clock.GotDecision{Now: time.Millisecond, Subject: int(d.Robot % 5), Msg: d}
			} else {
				var r turn.Report
				r, err = Report(data)
				ev = clock.GotReport{Now: time.Millisecond, Subject: int(r.Robot % 5), Msg: r}
			}
		})
		checkAlloc(t, "decoding", data, n)
		if err != nil {
			return
		}
		for _, a := range c.Step(ev) {
			if s, ok := a.(clock.SendClose); ok {
				for _, u := range s.Msg.Controls {
					if u < 0 || u > 4 {
						t.Fatalf("closed with an impossible control: %+v", s)
					}
				}
			}
		}
	})
}
