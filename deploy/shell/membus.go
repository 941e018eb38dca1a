package shell

import (
	"strings"
	"sync"
	"time"

	"github.com/nats-io/nats.go"
)

// MemBus is an in-process Bus for tests of the daemons' shells without a
// server: Publish hands the message to every matching subscription's
// channel at once, or drops it (counted in Dropped) when the channel is
// full, as the NATS client does. Subjects match token by token; "*" matches
// one token.
type MemBus struct {
	mu   sync.Mutex
	subs []*memSub
}

type memSub struct {
	bus     *MemBus
	subject string
	ch      chan *nats.Msg
	dropped int
}

func (b *MemBus) Publish(subject string, data []byte) error {
	b.mu.Lock()
	defer b.mu.Unlock()
	for _, s := range b.subs {
		if !match(s.subject, subject) {
			continue
		}
		select {
		case s.ch <- &nats.Msg{Subject: subject, Data: append([]byte(nil), data...)}:
		default:
			s.dropped++
		}
	}
	return nil
}

func (b *MemBus) ChanSubscribe(subject string, ch chan *nats.Msg) (Sub, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	s := &memSub{bus: b, subject: subject, ch: ch}
	b.subs = append(b.subs, s)
	return s, nil
}

func (b *MemBus) Flush() error                { return nil }
func (b *MemBus) Connected() bool             { return true }
func (b *MemBus) Status() string              { return "CONNECTED" }
func (b *MemBus) RTT() (time.Duration, error) { return 0, nil }
func (s *memSub) Dropped() (int, error) {
	s.bus.mu.Lock()
	defer s.bus.mu.Unlock()
	return s.dropped, nil
}
func (s *memSub) Unsubscribe() error {
	s.bus.mu.Lock()
	defer s.bus.mu.Unlock()
	for i, o := range s.bus.subs {
		if o == s {
			s.bus.subs = append(s.bus.subs[:i], s.bus.subs[i+1:]...)
			break
		}
	}
	return nil
}

func match(pattern, subject string) bool {
	p, s := strings.Split(pattern, "."), strings.Split(subject, ".")
	if len(p) != len(s) {
		return false
	}
	for i := range p {
		if p[i] != "*" && p[i] != s[i] {
			return false
		}
	}
	return true
}
