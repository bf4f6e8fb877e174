package commands

import (
	"context"
	"log/slog"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/qtally/qtally/internal/jobs"
	"github.com/qtally/qtally/internal/metrics"
	"github.com/qtally/qtally/storage"
)

// Job runner pacing: progress is written (and the runner shows it is
// alive) every jobReportInterval; a job not heard of for --job-stale-after
// is taken over by another runner, up to jobMaxAttempts claims in all.
const (
	jobReportInterval = time.Second
	jobMaxAttempts    = 3
	// idleSweepBatch bounds the idle episodes one policy's sweep closes in
	// one transaction; the next pass takes the rest.
	idleSweepBatch = 1000
)

// startHousekeeping starts the worker role's background work besides
// training: the job runner (evaluations, replays) and episode pruning.
// It returns the notifications they need.
func startHousekeeping(cfg workerConfig, db *storage.DB, reg prometheus.Registerer, m *metrics.Metrics, logger *slog.Logger,
	loops *backgroundLoops) map[string]storage.Subscription {
	jobWake := make(chan struct{}, 1)
	subs := map[string]storage.Subscription{
		storage.ChannelJobs: {Notify: func(int32) { nudge(jobWake) }, CatchUp: func() { nudge(jobWake) }},
	}
	runner := &jobs.Runner{
		Jobs: db, Evaluations: db, Replays: db, Batch: cfg.Batch(),
		Wake: jobWake, PollInterval: cfg.PollInterval,
		ReportInterval: jobReportInterval, StaleAfter: cfg.JobStaleAfter, MaxAttempts: jobMaxAttempts,
		Logger: logger,
	}
	loops.Go("job runner", runner.Run)

	// Open episodes idle past their policy's limit are ended or dropped;
	// the poll interval keeps the overshoot small against limits in seconds.
	loops.Go("idle open episodes", func(ctx context.Context) error {
		return every(ctx, cfg.PollInterval, func() {
			sweeps, err := db.CloseIdleEpisodes(ctx, idleSweepBatch)
			m.Open.ObserveIdleSweep(sweeps)
			if err != nil && ctx.Err() == nil {
				logger.Warn("closing idle open episodes", "error", err)
			}
		})
	})

	if cfg.EpisodeRetention <= 0 {
		return subs
	}
	retention := metrics.NewRetention(reg)
	loops.Go("episode pruning", func(ctx context.Context) error {
		return every(ctx, cfg.PruneInterval, func() {
			pruned, err := db.PruneEpisodes(ctx, cfg.EpisodeRetention, cfg.PruneBatch)
			retention.ObservePruned(pruned)
			if err != nil && ctx.Err() == nil {
				logger.Warn("pruning episodes", "error", err)
			}
		})
	})
	return subs
}
