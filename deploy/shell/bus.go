package shell

import (
	"errors"
	"strings"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"go.uber.org/zap"
)

// Bus is what the daemons need of NATS: publish, subscribe into a channel,
// connection state. *nats.Conn provides it through NATSBus; tests can give
// the shells a bus of their own.
//
// A channel subscription's pending limit is its channel's capacity: a
// message that finds the channel full is dropped by the client and counted
// in Sub.Dropped (the daemons add those to their dropped-message counters
// as "slow-consumer").
type Bus interface {
	Publish(subject string, data []byte) error
	ChanSubscribe(subject string, ch chan *nats.Msg) (Sub, error)
	Flush() error
	Connected() bool
	// Status says what the connection is doing, for health checks.
	Status() string
	RTT() (time.Duration, error)
}

// Sub is one subscription.
type Sub interface {
	Unsubscribe() error
	// Dropped is how many messages the client dropped because the
	// channel was full.
	Dropped() (int, error)
}

// NATSBus adapts a NATS connection.
type NATSBus struct{ *nats.Conn }

func (b NATSBus) ChanSubscribe(subject string, ch chan *nats.Msg) (Sub, error) {
	return b.Conn.ChanSubscribe(subject, ch)
}
func (b NATSBus) Connected() bool { return b.Conn.IsConnected() }
func (b NATSBus) Status() string  { return b.Conn.Status().String() }

// ClientErrors is a NATS option that logs the client's asynchronous errors
// (slow consumer, permission violations, ...) and counts them by kind, so
// nothing the client loses goes unseen. count may be nil.
func ClientErrors(lg *zap.Logger, count func(kind string)) nats.Option {
	return nats.ErrorHandler(func(_ *nats.Conn, sub *nats.Subscription, err error) {
		kind := "other"
		switch {
		case errors.Is(err, nats.ErrSlowConsumer):
			kind = "slow-consumer"
		case strings.Contains(strings.ToLower(err.Error()), "permission"):
			kind = "permission"
		}
		if count != nil {
			count(kind)
		}
		subject := ""
		if sub != nil {
			subject = sub.Subject
		}
		lg.Warn("NATS client error", zap.String("kind", kind), zap.String("subject", subject), zap.Error(err))
	})
}

// SubDrops turns the client's per-subscription drop counts into a counter
// of dropped messages (reason "slow-consumer"); Count is called
// periodically from the daemon's loop.
type SubDrops struct {
	subs []Sub
	seen []int
}

// Add tracks one more subscription.
func (s *SubDrops) Add(sub Sub) {
	s.subs = append(s.subs, sub)
	s.seen = append(s.seen, 0)
}

// Count adds what the client dropped since the last call to counter.
func (s *SubDrops) Count(counter *prometheus.CounterVec) {
	for i, sub := range s.subs {
		d, err := sub.Dropped()
		if err != nil || d <= s.seen[i] {
			continue
		}
		counter.WithLabelValues("slow-consumer").Add(float64(d - s.seen[i]))
		s.seen[i] = d
	}
}
