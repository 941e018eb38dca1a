package fault

import (
	"errors"
	"strings"
	"sync"
	"time"

	"github.com/nats-io/nats.go"

	"baton/agentd/turn"
	"baton/deploy/shell"
	pb "baton/proto"
	"baton/proto/wire"
)

// Bus wraps a daemon's bus with the layer on the receiving side: every
// message handed to one of the daemon's subscriptions is a delivery from
// its sender (the robot its subject names, else the coordinator) to Self,
// lost, delayed or duplicated as the layer says. Publishing is untouched,
// so each receiver's links are decided by that receiver's layer, as on a
// radio where each listener hears or misses on its own. The schedule goes
// by the round each message names (the latest seen, for messages that
// name none or do not decode).
type Bus struct {
	shell.Bus
	Subjects pb.Subjects
	Self     int // this daemon's endpoint (Coordinator or a robot)

	mu    sync.Mutex
	last  uint64 // the latest round a message named
	layer *Layer
	probe *Layer // draws for RTT, apart from the messages' streams
	stop  chan struct{}
	once  sync.Once
}

// NewBus wraps inner; specs must pass Check.
func NewBus(inner shell.Bus, subjects pb.Subjects, self int, seed uint64, specs []Spec) *Bus {
	return &Bus{Bus: inner, Subjects: subjects, Self: self, layer: New(seed, specs),
		probe: New(seed^0x70726f6265, specs), stop: make(chan struct{})}
}

// Stats is what the layer did so far.
func (b *Bus) Stats() Stats {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.layer.Stats()
}

// Close stops pending delayed deliveries.
func (b *Bus) Close() { b.once.Do(func() { close(b.stop) }) }

// round is the round msg names, or the latest named; b.mu held.
func (b *Bus) round(msg *nats.Msg) int {
	var r uint64
	var err error
	switch {
	case msg == nil:
		err = errNoRound
	case msg.Subject == b.Subjects.Round:
		var m turn.Start
		m, err = wire.Start(msg.Data)
		r = m.Round
	case msg.Subject == b.Subjects.Close:
		var m turn.Close
		m, err = wire.Close(msg.Data)
		r = m.Round
	case b.Subjects.RobotOf(msg.Subject) >= 0 && strings.Contains(msg.Subject, ".decision."):
		var m turn.Decision
		m, err = wire.Decision(msg.Data)
		r = m.Round
	default:
		err = errNoRound
	}
	// A forged far-future round must not move the schedule.
	if err == nil && r > b.last && r < b.last+turn.RoundWindow {
		b.last = r
	}
	if err == nil && r <= b.last {
		return int(min(r, 1<<30))
	}
	return int(min(b.last, 1<<30))
}

var errNoRound = errors.New("no round")

// ChanSubscribe subscribes inner into a channel of the bus's own and
// passes each message on to ch through the layer.
func (b *Bus) ChanSubscribe(subject string, ch chan *nats.Msg) (shell.Sub, error) {
	in := make(chan *nats.Msg, cap(ch))
	sub, err := b.Bus.ChanSubscribe(subject, in)
	if err != nil {
		return nil, err
	}
	go func() {
		for {
			select {
			case <-b.stop:
				return
			case msg := <-in:
				from := b.Subjects.RobotOf(msg.Subject)
				if from < 0 {
					from = Coordinator
				}
				b.mu.Lock()
				v := b.layer.Deliver(b.round(msg), from, b.Self)
				b.mu.Unlock()
				for c := range v.Copies {
					b.hand(ch, msg, v.After[c])
				}
			}
		}
	}()
	return sub, nil
}

// hand gives msg to ch after d; a full channel drops it, as the client
// would (the subscription's Dropped does not see these: the layer's own
// drops are the drill's, counted by the drill).
func (b *Bus) hand(ch chan *nats.Msg, msg *nats.Msg, d time.Duration) {
	put := func() {
		select {
		case <-b.stop:
			return
		default:
		}
		select {
		case ch <- msg:
		default:
		}
	}
	if d <= 0 {
		put()
		return
	}
	time.AfterFunc(d, put)
}

// RTT adds the layer's delays both ways to the server's round trip, so a
// daemon's hop measure sees the links the drill made slow.
func (b *Bus) RTT() (time.Duration, error) {
	rtt, err := b.Bus.RTT()
	if err != nil {
		return rtt, err
	}
	b.mu.Lock()
	r := b.round(nil)
	up, down := b.probe.Deliver(r, b.Self, Coordinator), b.probe.Deliver(r, Coordinator, b.Self)
	b.mu.Unlock()
	return rtt + up.After[0] + down.After[0], nil
}
