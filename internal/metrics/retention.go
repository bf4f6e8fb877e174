package metrics

import "github.com/prometheus/client_golang/prometheus"

// Retention counts what episode pruning removed. It lives in the worker
// role only, where pruning runs.
type Retention struct {
	EpisodesPruned *prometheus.CounterVec
}

// NewRetention registers the pruning metrics on reg.
func NewRetention(reg prometheus.Registerer) *Retention {
	r := &Retention{
		EpisodesPruned: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "qtally_episodes_pruned_total", Help: "Trained episodes deleted after the retention window.",
		}, []string{"policy"}),
	}
	reg.MustRegister(r.EpisodesPruned)
	return r
}

// ObservePruned records one pruning pass: episodes deleted per policy.
func (r *Retention) ObservePruned(pruned map[string]int64) {
	for policy, n := range pruned {
		r.EpisodesPruned.WithLabelValues(policy).Add(float64(n))
	}
}
