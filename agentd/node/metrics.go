package node

import (
	"github.com/prometheus/client_golang/prometheus"

	"baton/agentd/turn"
)

// Metrics are the daemon's Prometheus series.
type Metrics struct {
	TurnLatency *prometheus.HistogramVec
	Compute     prometheus.Histogram
	Turns       *prometheus.CounterVec
	Dropped     *prometheus.CounterVec
	Late        prometheus.Counter
	Rounds      prometheus.Counter
	Hop         prometheus.Gauge
	Model       prometheus.Gauge
	Resyncs     prometheus.Counter
	NATSErrors  *prometheus.CounterVec
}

// NewMetrics registers the series on reg (nil: a fresh registry).
func NewMetrics(reg prometheus.Registerer) *Metrics {
	m := &Metrics{
		TurnLatency: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name: "baton_turn_latency_seconds", Help: "From receiving a round start to publishing this robot's decision.",
			Buckets: prometheus.ExponentialBuckets(0.0001, 2, 18)}, []string{"mode"}),
		Compute: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "baton_compute_seconds", Help: "Rollout compute per turn.",
			Buckets: prometheus.ExponentialBuckets(0.0001, 2, 18)}),
		Turns: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "baton_turns_total", Help: "Turns decided, by whether any predecessor was guessed."}, []string{"guessed"}),
		Dropped: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "baton_messages_dropped_total", Help: "Messages dropped unread, by reason."}, []string{"reason"}),
		Late: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "baton_decisions_late_total", Help: "Predecessor decisions that arrived after this robot had decided."}),
		Rounds: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "baton_rounds_total", Help: "Rounds started."}),
		Hop: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "baton_hop_seconds", Help: "Latest one-way hop to the NATS server (RTT/2)."}),
		Model: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "baton_guess_model_version", Help: "Guess model version in use (0: none from the fleet)."}),
		Resyncs: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "baton_resyncs_total", Help: "Times this robot followed a run whose round starts it had refused, because the one it followed went quiet."}),
		NATSErrors: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "baton_nats_client_errors_total", Help: "Asynchronous NATS client errors, by kind (slow-consumer, permission, other)."}, []string{"kind"}),
	}
	for _, r := range turn.Reasons() {
		m.Dropped.WithLabelValues(string(r)) // every reason shows, from 0
	}
	if reg == nil {
		reg = prometheus.NewRegistry()
	}
	reg.MustRegister(m.TurnLatency, m.Compute, m.Turns, m.Dropped, m.Late, m.Rounds, m.Hop, m.Model, m.Resyncs, m.NATSErrors)
	return m
}
