// Package metrics defines qtally's Prometheus metrics on an explicit
// registry. Labels stay bounded: a policy name and small fixed sets, never a
// state or an action.
//
// Who exports what, so that no figure is counted twice:
//   - Event counters and histograms (Metrics) count what this process did;
//     sum them across processes.
//   - ReplicaCollector, registered by API processes, describes the
//     process's own in-memory Q copies; aggregate it with max.
//   - BacklogCollector reads each policy's backlog from the
//     database and is registered only by processes that run the worker, so
//     that scaling out the API does not multiply it; with several workers,
//     aggregate it with max.
package metrics

import (
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"

	"github.com/qtally/qtally/training"
)

// updateSizeBuckets bound |delta Q| from a millionth to a thousand in steps
// of about half a decade: constant-step updates shrink as estimates settle,
// and the drift of a settled table lives in the lowest buckets.
var updateSizeBuckets = []float64{1e-6, 3e-6, 1e-5, 3e-5, 1e-4, 3e-4, 1e-3, 3e-3, 0.01, 0.03, 0.1, 0.3, 1, 3, 10, 30, 100, 300, 1000}

// Metrics holds every collector the service updates directly.
type Metrics struct {
	EpisodesReceived  *prometheus.CounterVec
	EpisodesDuplicate *prometheus.CounterVec
	EpisodesRejected  *prometheus.CounterVec
	EpisodesTrained   *prometheus.CounterVec
	StepsTrained      *prometheus.CounterVec
	QUpdates          *prometheus.CounterVec
	UpdateSize        *prometheus.HistogramVec
	GreedyChanges     *prometheus.CounterVec
	EpisodeReturn     *prometheus.HistogramVec
	BatchDuration     *prometheus.HistogramVec
	LastBatch         *prometheus.GaugeVec
	TrainingErrors    prometheus.Counter
	Choices           *prometheus.CounterVec
	HTTPDuration      *prometheus.HistogramVec
	// Open counts what the process did with episodes qtally keeps open.
	Open *OpenEpisodeEvents

	requests seriesCache[requestSeries, prometheus.Observer]
	choices  seriesCache[choiceSeries, prometheus.Counter]
}

// New registers qtally's metrics and the Go and process collectors on reg.
func New(reg prometheus.Registerer) *Metrics {
	policy := []string{"policy"}
	m := &Metrics{
		EpisodesReceived: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "qtally_episodes_received_total", Help: "Episodes accepted and durably stored.",
		}, policy),
		EpisodesDuplicate: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "qtally_episodes_duplicate_total", Help: "Episodes posted again with an id already stored; not stored or learned again.",
		}, policy),
		EpisodesRejected: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "qtally_episodes_rejected_total", Help: "Episodes in batches refused as invalid.",
		}, policy),
		EpisodesTrained: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "qtally_episodes_trained_total", Help: "Episodes turned into Q updates.",
		}, policy),
		StepsTrained: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "qtally_steps_trained_total", Help: "Steps of trained episodes.",
		}, policy),
		QUpdates: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "qtally_q_updates_total", Help: "Constant-step updates applied to action values.",
		}, policy),
		UpdateSize: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name:    "qtally_q_update_size",
			Help:    "Absolute change |alpha (G - Q)| of each applied update: the estimates' drift.",
			Buckets: updateSizeBuckets,
		}, policy),
		GreedyChanges: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "qtally_greedy_changes_total", Help: "States whose set of greedy actions changed in a training batch.",
		}, policy),
		EpisodeReturn: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name:    "qtally_episode_return",
			Help:    "Discounted return G0 of each trained episode.",
			Buckets: []float64{-1000, -300, -100, -30, -10, -3, -1, -0.3, -0.1, 0, 0.1, 0.3, 1, 3, 10, 30, 100, 300, 1000},
		}, policy),
		BatchDuration: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name:    "qtally_training_batch_duration_seconds",
			Help:    "Time to read, learn and commit one training batch.",
			Buckets: []float64{0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60},
		}, policy),
		LastBatch: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "qtally_training_last_batch_timestamp_seconds", Help: "When this process last committed a training batch.",
		}, policy),
		TrainingErrors: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "qtally_training_errors_total", Help: "Training batches that failed and were rolled back.",
		}),
		Choices: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "qtally_choices_total", Help: "Actions chosen, by mode and whether the action was exploratory.",
		}, []string{"policy", "mode", "explored", "known_state"}),
		HTTPDuration: prometheus.NewHistogramVec(prometheus.HistogramOpts{
			Name:    "qtally_http_request_duration_seconds",
			Help:    "HTTP request latency by route.",
			Buckets: []float64{0.0005, 0.001, 0.002, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5},
		}, []string{"route", "method", "code"}),
	}
	reg.MustRegister(m.EpisodesReceived, m.EpisodesDuplicate, m.EpisodesRejected, m.EpisodesTrained,
		m.StepsTrained, m.QUpdates, m.UpdateSize, m.GreedyChanges, m.EpisodeReturn, m.BatchDuration,
		m.LastBatch, m.TrainingErrors, m.Choices, m.HTTPDuration,
		collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	m.Open = newOpenEpisodeEvents(reg)
	return m
}

// ObserveBatch records a committed training batch.
func (m *Metrics) ObserveBatch(r training.BatchReport) {
	p := r.PolicyName
	m.EpisodesTrained.WithLabelValues(p).Add(float64(r.Episodes))
	m.StepsTrained.WithLabelValues(p).Add(float64(r.Result.Steps))
	m.QUpdates.WithLabelValues(p).Add(float64(len(r.Result.AbsDeltas)))
	m.GreedyChanges.WithLabelValues(p).Add(float64(r.Result.GreedyChanges))
	size := m.UpdateSize.WithLabelValues(p)
	for _, d := range r.Result.AbsDeltas {
		size.Observe(d)
	}
	ret := m.EpisodeReturn.WithLabelValues(p)
	for _, g := range r.Result.EpisodeReturns {
		ret.Observe(g)
	}
	m.BatchDuration.WithLabelValues(p).Observe(r.Duration.Seconds())
	m.LastBatch.WithLabelValues(p).SetToCurrentTime()
}
