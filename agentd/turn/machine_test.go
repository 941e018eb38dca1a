package turn

import (
	"reflect"
	"strconv"
	"strings"
	"testing"
	"time"

	pb "baton/proto"

	"google.golang.org/protobuf/proto"
)

const fleet = "harbor-1"

func enc(t testing.TB, d *pb.Decision) []byte {
	t.Helper()
	b, err := proto.Marshal(d)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

func dec(round uint64, robot uint32, control int32) *pb.Decision {
	return &pb.Decision{Fleet: fleet, Round: round, Robot: robot, Control: control, Sender: senderName(int(robot))}
}

func senderName(r int) string { return "r" + strconv.Itoa(r) }

// fourRobots: robot 1 of a 4-robot fleet, round 5 running with order
// [0 1 2] (robot 3 sits out), hybrid, 5 controls each.
func fourRobots(t testing.TB) *Machine {
	t.Helper()
	m := New(Config{Fleet: fleet, Robot: 1, Robots: 4, Sender: "r1"})
	acts := m.Step(Round{Now: 0, Round: 5, Order: []int{0, 1, 2},
		Deadlines: []time.Duration{10 * time.Millisecond, 20 * time.Millisecond, 30 * time.Millisecond},
		Mode:      Hybrid, Controls: []int{5, 5, 5, 5}})
	if want := []Action{Arm{Round: 5, At: 10 * time.Millisecond}}; !reflect.DeepEqual(acts, want) {
		t.Fatalf("round start: got %#v want %#v", acts, want)
	}
	return m
}

func TestBadDecisions(t *testing.T) {
	cases := []struct {
		name   string
		before []*pb.Decision // accepted first
		data   func(t testing.TB) []byte
		reason DropReason
		sender string
		detail string // substring
	}{
		{name: "malformed bytes", data: func(testing.TB) []byte { return []byte{0xff, 0xff, 0xff} },
			reason: DropMalformed, sender: "", detail: "does not decode"},
		{name: "truncated field", data: func(testing.TB) []byte { return []byte{0x0a, 0x10, 'h'} },
			reason: DropMalformed, sender: "", detail: "does not decode"},
		{name: "other fleet", data: func(t testing.TB) []byte {
			d := dec(5, 0, 1)
			d.Fleet = "other"
			return enc(t, d)
		}, reason: DropForeign, sender: "0", detail: `fleet "other" is not "harbor-1"`},
		{name: "empty message", data: func(testing.TB) []byte { return nil },
			reason: DropForeign, sender: "0", detail: `fleet "" is not`},
		{name: "replayed old round", data: func(t testing.TB) []byte { return enc(t, dec(4, 0, 1)) },
			reason: DropStale, sender: "0", detail: "round 4 is before current round 5"},
		{name: "future round", data: func(t testing.TB) []byte { return enc(t, dec(7, 0, 1)) },
			reason: DropFuture, sender: "0", detail: "round 7"},
		{name: "robot not in order", data: func(t testing.TB) []byte { return enc(t, dec(5, 3, 1)) },
			reason: DropNotInOrder, sender: "3", detail: "robot 3 is not in the order of round 5"},
		{name: "duplicate", before: []*pb.Decision{dec(5, 2, 1)},
			data:   func(t testing.TB) []byte { return enc(t, dec(5, 2, 3)) },
			reason: DropDuplicate, sender: "2", detail: "second decision from robot 2"},
		{name: "duplicate next round", before: []*pb.Decision{dec(6, 2, 1)},
			data:   func(t testing.TB) []byte { return enc(t, dec(6, 2, 1)) },
			reason: DropDuplicate, sender: "2", detail: "round 6"},
		{name: "control too high", data: func(t testing.TB) []byte { return enc(t, dec(5, 0, 5)) },
			reason: DropMalformed, sender: "0", detail: "control 5 is outside 0..4"},
		{name: "negative control", data: func(t testing.TB) []byte { return enc(t, dec(5, 0, -1)) },
			reason: DropMalformed, sender: "0", detail: "control -1"},
		{name: "robot id too high", data: func(t testing.TB) []byte { return enc(t, dec(5, 4, 1)) },
			reason: DropMalformed, sender: "4", detail: "robot 4 is not below fleet size 4"},
		{name: "huge robot id", data: func(t testing.TB) []byte { return enc(t, dec(5, 1<<32-1, 1)) },
			reason: DropMalformed, sender: "4294967295", detail: "fleet size 4"},
		{name: "foreign sender claims our id", data: func(t testing.TB) []byte {
			d := dec(5, 1, 1)
			d.Sender = "impostor"
			return enc(t, d)
		}, reason: DropDuplicate, sender: "1", detail: "another sender claims robot 1"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			m := fourRobots(t)
			for _, d := range tc.before {
				if acts := m.Step(Heard{Data: enc(t, d)}); len(acts) != 0 {
					t.Fatalf("setup message caused %#v", acts)
				}
			}
			acts := m.Step(Heard{Now: time.Millisecond, Data: tc.data(t)})
			if len(acts) != 1 {
				t.Fatalf("got %d actions %#v, want one Drop", len(acts), acts)
			}
			d, ok := acts[0].(Drop)
			if !ok {
				t.Fatalf("got %#v, want Drop", acts[0])
			}
			if d.Reason != tc.reason || d.Sender != tc.sender || !strings.Contains(d.Detail, tc.detail) {
				t.Errorf("got %+v, want reason %s sender %q detail ~%q", d, tc.reason, tc.sender, tc.detail)
			}
			c := m.Counters()
			if c.Drops[tc.reason] != 1 || c.Dropped() != 1 || c.Late != 0 {
				t.Errorf("counters %+v", c)
			}
			// The round goes on as if the message never came: the timer
			// still computes with robot 0 guessed.
			acts = m.Step(Timer{Now: 10 * time.Millisecond, Round: 5})
			want := []Action{Compute{Round: 5, Known: []int{-1, -1, -1, -1}, Guess: []int{0}}}
			if !reflect.DeepEqual(acts, want) {
				t.Errorf("after drop, timer gave %#v want %#v", acts, want)
			}
		})
	}
}

func TestOwnEchoIgnored(t *testing.T) {
	m := fourRobots(t)
	d := dec(5, 1, 2)
	d.Sender = "r1"
	if acts := m.Step(Heard{Data: enc(t, d)}); len(acts) != 0 {
		t.Fatalf("echo caused %#v", acts)
	}
	if c := m.Counters(); c.Dropped() != 0 {
		t.Fatalf("echo counted: %+v", c)
	}
}

func TestBadRounds(t *testing.T) {
	ms := time.Millisecond
	good := Round{Now: 0, Round: 6, Order: []int{0, 1}, Deadlines: []time.Duration{ms, 2 * ms}, Mode: Sequential, Controls: []int{5, 5, 5, 5}}
	cases := []struct {
		name   string
		mut    func(r *Round)
		reason DropReason
		detail string
	}{
		{"stale", func(r *Round) { r.Round = 4 }, DropStale, "round 4 is before current round 5"},
		{"same round", func(r *Round) { r.Round = 5 }, DropDuplicate, "round 5 already started"},
		{"round zero", func(r *Round) { r.Round = 0 }, DropMalformed, "round 0"},
		{"deadline count", func(r *Round) { r.Deadlines = r.Deadlines[:1] }, DropMalformed, "1 deadlines for 2 turns"},
		{"nil deadlines", func(r *Round) { r.Deadlines = nil }, DropMalformed, "0 deadlines"},
		{"duplicate id", func(r *Round) { r.Order = []int{1, 1} }, DropMalformed, "robot 1 appears twice"},
		{"id too high", func(r *Round) { r.Order = []int{0, 4} }, DropMalformed, "order[1] = robot 4"},
		{"negative id", func(r *Round) { r.Order = []int{-1, 0} }, DropMalformed, "order[0] = robot -1"},
		{"controls length", func(r *Round) { r.Controls = []int{5} }, DropMalformed, "1 control counts for 4 robots"},
		{"negative controls", func(r *Round) { r.Controls = []int{5, -1, 5, 5} }, DropMalformed, "controls[1] = -1"},
		{"decreasing deadlines", func(r *Round) { r.Deadlines = []time.Duration{2 * ms, ms} }, DropMalformed, "deadline 1 (1ms) is before deadline 0"},
		{"negative deadline", func(r *Round) { r.Deadlines = []time.Duration{-ms, ms} }, DropMalformed, "deadline 0 is negative"},
		{"bad mode", func(r *Round) { r.Mode = 0 }, DropMalformed, "mode 0"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			m := fourRobots(t)
			r := good
			tc.mut(&r)
			acts := m.Step(r)
			if len(acts) != 1 {
				t.Fatalf("got %#v", acts)
			}
			d, ok := acts[0].(Drop)
			if !ok || d.Reason != tc.reason || !strings.Contains(d.Detail, tc.detail) {
				t.Fatalf("got %#v, want %s ~%q", acts[0], tc.reason, tc.detail)
			}
			if m.Round() != 5 {
				t.Fatalf("round changed to %d", m.Round())
			}
			if c := m.Counters(); c.Drops[tc.reason] != 1 {
				t.Errorf("counters %+v", c)
			}
			// The old round is still live.
			acts = m.Step(Heard{Data: enc(t, dec(5, 0, 3))})
			want := []Action{Compute{Round: 5, Known: []int{3, -1, -1, -1}}}
			if !reflect.DeepEqual(acts, want) {
				t.Errorf("old round not live: %#v", acts)
			}
		})
	}
}

func TestHybridTurn(t *testing.T) {
	ms := time.Millisecond
	m := New(Config{Fleet: fleet, Robot: 3, Robots: 4, Sender: "r3"})
	acts := m.Step(Round{Now: 100 * ms, Round: 1, Order: []int{2, 0, 3, 1},
		Deadlines: []time.Duration{5 * ms, 10 * ms, 15 * ms, 20 * ms}, Mode: Hybrid, Controls: []int{5, 5, 5, 5}})
	if want := []Action{Arm{Round: 1, At: 110 * ms}}; !reflect.DeepEqual(acts, want) {
		t.Fatalf("got %#v", acts)
	}
	// Successor's decision: recorded, nothing to do.
	if acts := m.Step(Heard{Data: enc(t, dec(1, 1, 4))}); len(acts) != 0 {
		t.Fatalf("successor: %#v", acts)
	}
	if acts := m.Step(Heard{Data: enc(t, dec(1, 2, 2))}); len(acts) != 0 {
		t.Fatalf("first predecessor: %#v", acts)
	}
	// A timer for another round is ignored.
	if acts := m.Step(Timer{Round: 2}); len(acts) != 0 {
		t.Fatalf("wrong timer: %#v", acts)
	}
	acts = m.Step(Timer{Now: 110 * ms, Round: 1})
	want := []Action{Compute{Round: 1, Known: []int{-1, -1, 2, -1}, Guess: []int{0}}}
	if !reflect.DeepEqual(acts, want) {
		t.Fatalf("timer: got %#v want %#v", acts, want)
	}
	// Robot 0 arrives after the Compute: late, not a drop, not used.
	if acts := m.Step(Heard{Data: enc(t, dec(1, 0, 1))}); len(acts) != 0 {
		t.Fatalf("late: %#v", acts)
	}
	if c := m.Counters(); c.Late != 1 || c.Dropped() != 0 {
		t.Fatalf("counters %+v", c)
	}
	// The timer again, and a Computed for another round: ignored.
	if acts := m.Step(Timer{Round: 1}); len(acts) != 0 {
		t.Fatalf("second timer: %#v", acts)
	}
	if acts := m.Step(Computed{Round: 2, Control: 1}); len(acts) != 0 {
		t.Fatalf("wrong computed: %#v", acts)
	}
	// A control the driver got wrong is not published.
	acts = m.Step(Computed{Round: 1, Control: -1})
	if d, ok := acts[0].(Drop); len(acts) != 1 || !ok || d.Reason != DropMalformed || d.Sender != "3" {
		t.Fatalf("bad computed: %#v", acts)
	}
	acts = m.Step(Computed{Now: 113 * ms, Round: 1, Control: 4, Took: 2500 * time.Microsecond})
	wantD := &pb.Decision{Fleet: fleet, Round: 1, Robot: 3, Control: 4, Heard: []uint32{2}, Guessed: []uint32{0}, ComputeUs: 2500, Sender: "r3"}
	if len(acts) != 1 {
		t.Fatalf("publish: %#v", acts)
	}
	if p, ok := acts[0].(Publish); !ok || !proto.Equal(p.Decision, wantD) {
		t.Fatalf("publish: got %v want %v", acts[0], wantD)
	}
	// Done: nothing more for this round.
	if acts := m.Step(Computed{Round: 1, Control: 4}); len(acts) != 0 {
		t.Fatalf("second computed: %#v", acts)
	}
}

func TestSequentialWaitsAndNewRoundAbandons(t *testing.T) {
	m := New(Config{Fleet: fleet, Robot: 2, Robots: 3, Sender: "r2"})
	r := Round{Round: 1, Order: []int{0, 1, 2}, Deadlines: make([]time.Duration, 3), Mode: Sequential, Controls: []int{3, 3, 3}}
	if acts := m.Step(r); len(acts) != 0 {
		t.Fatalf("sequential start armed or computed: %#v", acts)
	}
	if acts := m.Step(Heard{Data: enc(t, dec(1, 0, 1))}); len(acts) != 0 {
		t.Fatalf("%#v", acts)
	}
	if acts := m.Step(Timer{Round: 1}); len(acts) != 0 {
		t.Fatalf("sequential has no timer: %#v", acts)
	}
	// Round 2 abandons round 1; robot 1's round-1 decision is now stale.
	r.Round, r.Order = 2, []int{2, 0, 1}
	acts := m.Step(r)
	if want := []Action{Compute{Round: 2, Known: []int{-1, -1, -1}}}; !reflect.DeepEqual(acts, want) {
		t.Fatalf("round 2: %#v", acts)
	}
	acts = m.Step(Heard{Data: enc(t, dec(1, 1, 1))})
	if d, ok := acts[0].(Drop); !ok || d.Reason != DropStale {
		t.Fatalf("old decision: %#v", acts)
	}
	if acts := m.Step(Computed{Round: 1, Control: 1}); len(acts) != 0 {
		t.Fatalf("old computed: %#v", acts)
	}
	if p, ok := m.Step(Computed{Round: 2, Control: 2})[0].(Publish); !ok || p.Decision.Round != 2 || len(p.Decision.Heard)+len(p.Decision.Guessed) != 0 {
		t.Fatalf("round 2 publish: %v", p)
	}
}

func TestParallelGuessesEveryone(t *testing.T) {
	m := New(Config{Fleet: fleet, Robot: 2, Robots: 3, Sender: "r2"})
	// Robot 0's round-1 decision arrives early; parallel still guesses it.
	if acts := m.Step(Heard{Data: enc(t, dec(1, 0, 1))}); len(acts) != 0 {
		t.Fatalf("%#v", acts)
	}
	acts := m.Step(Round{Round: 1, Order: []int{0, 1, 2}, Deadlines: make([]time.Duration, 3), Mode: Parallel, Controls: []int{3, 3, 3}})
	if want := []Action{Compute{Round: 1, Known: []int{-1, -1, -1}, Guess: []int{0, 1}}}; !reflect.DeepEqual(acts, want) {
		t.Fatalf("%#v", acts)
	}
	m.Step(Heard{Data: enc(t, dec(1, 1, 1))})
	if c := m.Counters(); c.Late != 0 { // parallel: nobody waits, nothing is late
		t.Fatalf("late %+v", c)
	}
	p := m.Step(Computed{Round: 1, Control: 0})[0].(Publish)
	if !reflect.DeepEqual(p.Decision.Guessed, []uint32{0, 1}) || len(p.Decision.Heard) != 0 {
		t.Fatalf("%v", p.Decision)
	}
}

func TestEarlyDecisionsBuffered(t *testing.T) {
	m := New(Config{Fleet: fleet, Robot: 2, Robots: 4, Sender: "r2"})
	for _, d := range []*pb.Decision{dec(1, 0, 4), dec(1, 1, 2), dec(1, 3, 9), dec(1, 3, 1)} {
		m.Step(Heard{Data: enc(t, d)})
	}
	// The second robot-3 decision was a duplicate; round 2 is too far ahead.
	if c := m.Counters(); c.Drops[DropDuplicate] != 1 {
		t.Fatalf("%+v", c)
	}
	if a := m.Step(Heard{Data: enc(t, dec(2, 0, 1))}); a[0].(Drop).Reason != DropFuture {
		t.Fatalf("%#v", a)
	}
	// Round 1: robot 3 sits out (not-in-order), robot 3's control 9 would
	// be malformed anyway; both predecessors are known so no waiting.
	acts := m.Step(Round{Round: 1, Order: []int{1, 0, 2}, Deadlines: make([]time.Duration, 3), Mode: Hybrid, Controls: []int{5, 5, 5, 5}})
	if len(acts) != 2 {
		t.Fatalf("%#v", acts)
	}
	if d := acts[0].(Drop); d.Reason != DropNotInOrder || d.Sender != "3" {
		t.Fatalf("%#v", acts[0])
	}
	if want := (Compute{Round: 1, Known: []int{4, 2, -1, -1}}); !reflect.DeepEqual(acts[1], want) {
		t.Fatalf("got %#v want %#v", acts[1], want)
	}
	// Buffered decisions are validated against the round: out of range.
	m2 := New(Config{Fleet: fleet, Robot: 2, Robots: 4, Sender: "r2"})
	m2.Step(Heard{Data: enc(t, dec(1, 0, 4))})
	acts = m2.Step(Round{Round: 1, Order: []int{0, 2}, Deadlines: make([]time.Duration, 2), Mode: Sequential, Controls: []int{3, 5, 5, 5}})
	if len(acts) != 1 || acts[0].(Drop).Reason != DropMalformed {
		t.Fatalf("%#v", acts)
	}
	// A buffer for a round that never started is stale when a later one does.
	m3 := New(Config{Fleet: fleet, Robot: 2, Robots: 4, Sender: "r2"})
	m3.Step(Heard{Data: enc(t, dec(1, 0, 4))})
	acts = m3.Step(Round{Round: 3, Order: []int{2}, Deadlines: make([]time.Duration, 1), Mode: Sequential, Controls: []int{5, 5, 5, 5}})
	if len(acts) != 2 || acts[0].(Drop).Reason != DropStale {
		t.Fatalf("%#v", acts)
	}
}

func TestSitOut(t *testing.T) {
	m := New(Config{Fleet: fleet, Robot: 3, Robots: 4, Sender: "r3"})
	if acts := m.Step(Round{Round: 1, Order: []int{0, 1}, Deadlines: make([]time.Duration, 2), Mode: Hybrid, Controls: []int{5, 5, 5, 5}}); len(acts) != 0 {
		t.Fatalf("%#v", acts)
	}
	for _, ev := range []Event{Heard{Data: enc(t, dec(1, 0, 1))}, Timer{Round: 1}, Computed{Round: 1}} {
		if acts := m.Step(ev); len(acts) != 0 {
			t.Fatalf("%T: %#v", ev, acts)
		}
	}
}

func TestOddEvents(t *testing.T) {
	m := New(Config{Fleet: fleet, Robot: 0, Robots: 2})
	for _, ev := range []Event{nil, (*Round)(nil), (*Heard)(nil), (*Timer)(nil), (*Computed)(nil), Timer{}, Computed{}} {
		if acts := m.Step(ev); len(acts) != 0 {
			t.Fatalf("%#v: %#v", ev, acts)
		}
	}
	acts := m.Step(&Round{Round: 1, Order: []int{0}, Deadlines: []time.Duration{0}, Mode: Sequential, Controls: []int{1, 1}})
	if len(acts) != 1 {
		t.Fatalf("pointer round: %#v", acts)
	}
	// A machine with a nonsense config refuses rounds instead of panicking.
	for _, cfg := range []Config{{Robots: -1}, {Robots: 0}, {Robot: -5, Robots: 2}, {Robot: 7, Robots: 2}} {
		m := New(cfg)
		m.Step(Round{Round: 1, Order: []int{0}, Deadlines: []time.Duration{0}, Mode: Parallel, Controls: []int{1, 1}})
		m.Step(Heard{Data: enc(t, &pb.Decision{Round: 1, Robot: 1})})
	}
}
