package shell

import (
	"github.com/prometheus/client_golang/prometheus"
	"go.uber.org/zap"
)

// maxDropKeys bounds the (reason, sender) pairs Drops remembers: senders
// come from the bus, so a flood of invented names must not grow memory.
const maxDropKeys = 1024

// Drops counts every dropped message by reason and logs only the first of
// each (reason, sender): a flood of bad messages must not flood the log.
// Not safe for concurrent use; each daemon's event loop owns one.
type Drops struct {
	Log     *zap.Logger
	Counter *prometheus.CounterVec // label: reason
	seen    map[string]bool
	full    bool
}

// Drop records one dropped message.
func (d *Drops) Drop(reason, sender, detail string) {
	d.Counter.WithLabelValues(reason).Inc()
	if len(sender) > 64 {
		sender = sender[:64]
	}
	key := reason + "/" + sender
	if d.seen[key] || d.full {
		return
	}
	if d.seen == nil {
		d.seen = map[string]bool{}
	}
	if len(d.seen) >= maxDropKeys {
		d.full = true
		d.Log.Warn("dropped messages from many different senders: from now on drops are only counted (see the dropped-message metrics)")
		return
	}
	d.seen[key] = true
	d.Log.Warn("dropped message (further drops of this kind from this sender are counted, not logged)",
		zap.String("reason", reason), zap.String("sender", sender), zap.String("detail", detail))
}
