package metrics

import (
	"context"
	"log/slog"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/qtally/qtally/internal/views"
)

// BacklogSource reads every policy's backlog from the database.
type BacklogSource interface {
	Backlogs(ctx context.Context) ([]views.Backlog, error)
}

// BacklogCollector exports each policy's backlog (episodes not trained
// yet, and the oldest one's age), read from the database at scrape time
// within its own timeout. Register it in one role only (the worker), so
// that replicas of the API do not export the same table-wide figure twice.
type BacklogCollector struct {
	source  BacklogSource
	timeout time.Duration
	logger  *slog.Logger

	backlog   *prometheus.Desc
	oldestAge *prometheus.Desc
	up        *prometheus.Desc
}

// NewBacklogCollector returns a collector reading source within timeout.
func NewBacklogCollector(source BacklogSource, timeout time.Duration, logger *slog.Logger) *BacklogCollector {
	return &BacklogCollector{
		source: source, timeout: timeout, logger: logger,
		backlog: prometheus.NewDesc("qtally_backlog_episodes",
			"Stored episodes not trained yet.", []string{"policy"}, nil),
		oldestAge: prometheus.NewDesc("qtally_backlog_oldest_age_seconds",
			"Age of the oldest untrained episode (0 when none).", []string{"policy"}, nil),
		up: prometheus.NewDesc("qtally_table_scrape_success",
			"1 when the database figures of this scrape were read, else 0.", nil, nil),
	}
}

// Describe implements prometheus.Collector.
func (c *BacklogCollector) Describe(ch chan<- *prometheus.Desc) {
	ch <- c.backlog
	ch <- c.oldestAge
	ch <- c.up
}

// Collect implements prometheus.Collector.
func (c *BacklogCollector) Collect(ch chan<- prometheus.Metric) {
	ctx, cancel := context.WithTimeout(context.Background(), c.timeout)
	defer cancel()
	backlogs, err := c.source.Backlogs(ctx)
	if err != nil {
		c.logger.Warn("metrics: reading backlog", "error", err)
		ch <- prometheus.MustNewConstMetric(c.up, prometheus.GaugeValue, 0)
		return
	}
	now := time.Now()
	for _, b := range backlogs {
		ch <- prometheus.MustNewConstMetric(c.backlog, prometheus.GaugeValue, float64(b.Episodes), b.Policy)
		age := 0.0
		if b.OldestReceived != nil {
			age = now.Sub(*b.OldestReceived).Seconds()
		}
		ch <- prometheus.MustNewConstMetric(c.oldestAge, prometheus.GaugeValue, age, b.Policy)
	}
	ch <- prometheus.MustNewConstMetric(c.up, prometheus.GaugeValue, 1)
}
