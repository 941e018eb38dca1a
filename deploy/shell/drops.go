package shell

import (
	"github.com/prometheus/client_golang/prometheus"
	"go.uber.org/zap"
)

// Drops counts every dropped message by reason and logs only the first of
// each (reason, sender): a flood of bad messages must not flood the log.
// Not safe for concurrent use; each daemon's event loop owns one.
type Drops struct {
	Log     *zap.Logger
	Counter *prometheus.CounterVec // label: reason
	seen    map[string]bool
}

// Drop records one dropped message.
func (d *Drops) Drop(reason, sender, detail string) {
	d.Counter.WithLabelValues(reason).Inc()
	key := reason + "/" + sender
	if d.seen[key] {
		return
	}
	if d.seen == nil {
		d.seen = map[string]bool{}
	}
	d.seen[key] = true
	d.Log.Warn("dropped message (further drops of this kind from this sender are counted, not logged)",
		zap.String("reason", reason), zap.String("sender", sender), zap.String("detail", detail))
}
