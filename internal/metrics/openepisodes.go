package metrics

import (
	"context"
	"log/slog"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/qtally/qtally/training"
)

// How an open episode closed: the how label of qtally_open_episodes_closed_total.
const (
	ClosedEnded       = "ended"
	ClosedIdleEnded   = "idle_ended"
	ClosedIdleDropped = "idle_dropped"
)

// OpenEpisodeEvents count what this process did with open episodes.
type OpenEpisodeEvents struct {
	DecisionsRecorded *prometheus.CounterVec
	DecisionsRepeated *prometheus.CounterVec
	RewardsAdded      *prometheus.CounterVec
	Closed            *prometheus.CounterVec
	BatchSize         prometheus.Histogram
	BatchDuration     prometheus.Histogram
}

func newOpenEpisodeEvents(reg prometheus.Registerer) *OpenEpisodeEvents {
	policy := []string{"policy"}
	o := &OpenEpisodeEvents{
		DecisionsRecorded: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "qtally_decisions_recorded_total", Help: "Choose decisions durably recorded in open episodes.",
		}, policy),
		DecisionsRepeated: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "qtally_decisions_repeated_total", Help: "Retried recorded chooses answered with the decision recorded before.",
		}, policy),
		RewardsAdded: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "qtally_open_episode_rewards_added_total", Help: "Rewards added to decisions of open episodes.",
		}, policy),
		Closed: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "qtally_open_episodes_closed_total",
			Help: "Open episodes closed: ended by the application, or ended or dropped for being idle.",
		}, []string{"policy", "how"}),
		BatchSize: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "qtally_decision_batch_size", Help: "Decisions committed together by one group commit.",
			Buckets: []float64{1, 2, 4, 8, 16, 32, 64, 128, 256, 512},
		}),
		BatchDuration: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "qtally_decision_batch_duration_seconds", Help: "Time to commit one group of recorded decisions.",
			Buckets: []float64{0.0005, 0.001, 0.002, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1},
		}),
	}
	reg.MustRegister(o.DecisionsRecorded, o.DecisionsRepeated, o.RewardsAdded, o.Closed, o.BatchSize, o.BatchDuration)
	return o
}

// ObserveDecisionBatch records one group commit.
func (o *OpenEpisodeEvents) ObserveDecisionBatch(decisions int, took time.Duration) {
	o.BatchSize.Observe(float64(decisions))
	o.BatchDuration.Observe(took.Seconds())
}

// ObserveIdleSweep counts the episodes housekeeping closed.
func (o *OpenEpisodeEvents) ObserveIdleSweep(sweeps []training.IdleSweep) {
	for _, s := range sweeps {
		o.Closed.WithLabelValues(s.Policy, ClosedIdleEnded).Add(float64(s.Ended))
		o.Closed.WithLabelValues(s.Policy, ClosedIdleDropped).Add(float64(s.Dropped))
	}
}

// OpenEpisodeSource reads open-episode figures from the database.
type OpenEpisodeSource interface {
	OpenEpisodeFigures(ctx context.Context) ([]training.OpenEpisodeFigures, error)
}

// OpenEpisodeCollector exports, per policy, the open episodes and their
// ages and the totals closed each way, read from the database at scrape
// time. Like BacklogCollector it is registered by worker processes only.
type OpenEpisodeCollector struct {
	source  OpenEpisodeSource
	timeout time.Duration
	logger  *slog.Logger

	open, oldestAge, longestIdle, closed *prometheus.Desc
}

// NewOpenEpisodeCollector returns a collector reading source within timeout.
func NewOpenEpisodeCollector(source OpenEpisodeSource, timeout time.Duration, logger *slog.Logger) *OpenEpisodeCollector {
	policy := []string{"policy"}
	return &OpenEpisodeCollector{
		source: source, timeout: timeout, logger: logger,
		open: prometheus.NewDesc("qtally_open_episodes", "Episodes qtally keeps open.", policy, nil),
		oldestAge: prometheus.NewDesc("qtally_open_episode_oldest_age_seconds",
			"Time since the oldest open episode opened (0 when none).", policy, nil),
		longestIdle: prometheus.NewDesc("qtally_open_episode_longest_idle_seconds",
			"Time since the open episode idle longest had a decision or reward (0 when none).", policy, nil),
		closed: prometheus.NewDesc("qtally_open_episodes_closed_stored",
			"Open episodes closed so far, as stored: ended by the application, ended or dropped for being idle.",
			[]string{"policy", "how"}, nil),
	}
}

// Describe implements prometheus.Collector.
func (c *OpenEpisodeCollector) Describe(ch chan<- *prometheus.Desc) {
	ch <- c.open
	ch <- c.oldestAge
	ch <- c.longestIdle
	ch <- c.closed
}

// Collect implements prometheus.Collector.
func (c *OpenEpisodeCollector) Collect(ch chan<- prometheus.Metric) {
	ctx, cancel := context.WithTimeout(context.Background(), c.timeout)
	defer cancel()
	figures, err := c.source.OpenEpisodeFigures(ctx)
	if err != nil {
		c.logger.Warn("metrics: reading open episodes", "error", err)
		return
	}
	now := time.Now()
	since := func(t *time.Time) float64 {
		if t == nil {
			return 0
		}
		return max(0, now.Sub(*t).Seconds())
	}
	for _, f := range figures {
		ch <- prometheus.MustNewConstMetric(c.open, prometheus.GaugeValue, float64(f.Open), f.Policy)
		ch <- prometheus.MustNewConstMetric(c.oldestAge, prometheus.GaugeValue, since(f.OldestOpenedAt), f.Policy)
		ch <- prometheus.MustNewConstMetric(c.longestIdle, prometheus.GaugeValue, since(f.LongestIdleSince), f.Policy)
		ch <- prometheus.MustNewConstMetric(c.closed, prometheus.GaugeValue, float64(f.Ended), f.Policy, ClosedEnded)
		ch <- prometheus.MustNewConstMetric(c.closed, prometheus.GaugeValue, float64(f.EndedIdle), f.Policy, ClosedIdleEnded)
		ch <- prometheus.MustNewConstMetric(c.closed, prometheus.GaugeValue, float64(f.Dropped), f.Policy, ClosedIdleDropped)
	}
}
