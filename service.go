package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/qtally/qtally/api"
	"github.com/qtally/qtally/metrics"
	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/training"
)

// minBatchEpisodes is the smallest batch limit while training keeps up:
// below it, a batch's fixed costs (its round trips and durable commit)
// outweigh its episodes.
const minBatchEpisodes = 100

// runService runs the API, the worker, or both, until ctx ends, then shuts
// down within the grace period: in-flight requests finish and the worker
// commits or rolls back its batch.
func runService(ctx context.Context, cfg serviceConfig, logger *slog.Logger, stdout io.Writer) error {
	db, err := storage.Open(ctx, cfg.DatabaseURL, cfg.DBMaxConns, cfg.Limits)
	if err != nil {
		return err
	}
	defer db.Close()
	if err := db.SetHistory(cfg.History); err != nil {
		return err
	}
	db.SetWarmPairs(cfg.WarmPairs)
	if cfg.BatchTarget > 0 {
		db.SetBatchSizer(&training.BatchSizer{Target: cfg.BatchTarget, Min: minBatchEpisodes})
	}

	reg := prometheus.NewRegistry()
	m := metrics.New(reg)
	replica := training.NewReplica(db)
	wake := make(chan struct{}, 1)

	var wg sync.WaitGroup
	defer wg.Wait()
	bgCtx, stopBackground := context.WithCancel(context.WithoutCancel(ctx))
	defer stopBackground()
	goBackground := func(name string, fn func(context.Context) error) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			if err := fn(bgCtx); err != nil {
				logger.Error(name+" stopped", "error", err)
			}
		}()
	}

	if cfg.PprofListen != "" {
		l, err := listenProfiling(cfg.PprofListen)
		if err != nil {
			return err
		}
		goBackground("profiling server", func(ctx context.Context) error { return serveProfiling(ctx, l, stdout) })
	}

	subs := map[string]storage.Subscription{}
	if cfg.RunAPI {
		reg.MustRegister(metrics.NewReplicaCollector(replica, cfg.CoverageVisits))
		subs[storage.ChannelPolicy] = storage.Subscription{
			Notify: func(id int32) {
				if err := replica.Refresh(bgCtx, id); err != nil {
					logger.Warn("refreshing in-memory Q", "policy_id", id, "error", err)
				}
			},
			CatchUp: func() {
				if err := replica.RefreshAll(bgCtx); err != nil {
					logger.Warn("catching up on Q changes", "error", err)
				}
			},
		}
		goBackground("choice counts", func(ctx context.Context) error {
			err := every(ctx, choiceFlushEvery, func() {
				if err := replica.FlushChoices(ctx, db); err != nil {
					logger.Warn("storing choice counts", "error", err)
				}
			})
			// The counts since the last flush, before the process ends.
			final, cancel := context.WithTimeout(context.WithoutCancel(ctx), 5*time.Second)
			defer cancel()
			return errors.Join(err, replica.FlushChoices(final, db))
		})
		goBackground("replica poll", func(ctx context.Context) error {
			return every(ctx, cfg.PollInterval, func() {
				if err := replica.RefreshAll(ctx); err != nil {
					logger.Warn("polling for Q changes", "error", err)
				}
			})
		})
	}
	var auth api.Authenticator
	var sessions api.PageSessions
	var keeper training.Keeper
	if cfg.RunAPI {
		if keyring := startKeyring(ctx, cfg.Auth, db, subs, goBackground, logger, stdout); keyring != nil {
			auth = keyring
			sessions = training.PageSessions{Store: db, Tokens: keyring, Life: pageSessionLife, Key: training.SessionKey(cfg.Auth.Pepper)}
		}
		batcher := db.NewDecisionBatcher(storage.GroupCommit{MaxBatch: decisionBatchMax, InFlight: decisionCommitsInFlight, Window: decisionBatchWindow})
		batcher.Observe = m.Open.ObserveDecisionBatch
		goBackground("decision recorder", batcher.Run)
		keeper = training.Keeper{Replica: replica, Recorder: batcher}
	}
	if cfg.RunWorker {
		subs[storage.ChannelEpisodes] = storage.Subscription{Notify: func(int32) { nudge(wake) }, CatchUp: func() { nudge(wake) }}
		reg.MustRegister(metrics.NewTableCollector(db, 5*time.Second, logger))
		reg.MustRegister(metrics.NewOpenEpisodeCollector(db, 5*time.Second, logger))
		startHousekeeping(cfg, db, reg, m, logger, subs, goBackground)
	}
	goBackground("notification listener", func(ctx context.Context) error {
		return db.Listen(ctx, logger, subs)
	})

	workerDone := make(chan struct{})
	if cfg.RunWorker {
		w := &training.Worker{
			Store: db, BatchEpisodes: cfg.BatchEpisodes, Wake: wake, PollInterval: cfg.PollInterval,
			BatchTimeout: cfg.ShutdownGrace, OnBatch: m.ObserveBatch, Logger: logger,
			OnError: func(error) { m.TrainingErrors.Inc() },
		}
		go func() {
			defer close(workerDone)
			_ = w.Run(ctx)
		}()
	} else {
		close(workerDone)
	}

	var handler http.Handler
	if cfg.RunAPI {
		handler = api.NewServer(cfg.HTTP, api.Deps{Logger: logger, Policies: db, History: db, Eraser: db, Episodes: db, States: db,
			Chooser: replica, Recorder: keeper, OpenEpisodes: db, Inspect: db, Ready: db, Metrics: m, Gatherer: reg, Auth: auth, Sessions: sessions,
			Snapshots: db, Tables: training.Tables{Store: db, Replica: replica, Logger: logger}, Jobs: db, Audit: db})
	} else {
		handler = api.NewHealthServer(cfg.HTTP, api.Deps{Logger: logger, Ready: db, Metrics: m, Gatherer: reg})
	}
	listener, err := net.Listen("tcp", cfg.Listen)
	if err != nil {
		return fmt.Errorf("listen on %s: %w", cfg.Listen, err)
	}
	fmt.Fprintf(stdout, "qtally: listening on http://%s\n", listener.Addr())
	if cfg.OnListening != nil {
		goBackground("on listening", func(context.Context) error {
			cfg.OnListening(ctx, "http://"+listener.Addr().String())
			return nil
		})
	}
	srv := &http.Server{Handler: handler, ReadHeaderTimeout: cfg.Server.ReadHeaderTimeout, ReadTimeout: cfg.Server.ReadTimeout,
		WriteTimeout: cfg.Server.WriteTimeout, IdleTimeout: cfg.Server.IdleTimeout, MaxHeaderBytes: cfg.Server.MaxHeaderBytes}
	serveErr := make(chan error, 1)
	go func() { serveErr <- srv.Serve(listener) }()

	select {
	case err := <-serveErr:
		return fmt.Errorf("http server: %w", err)
	case <-ctx.Done():
	}
	logger.Info("shutting down", "grace", cfg.ShutdownGrace)
	shutdownCtx, cancel := context.WithTimeout(context.Background(), cfg.ShutdownGrace)
	defer cancel()
	if err := srv.Shutdown(shutdownCtx); err != nil && !errors.Is(err, http.ErrServerClosed) {
		// Requests still running hold database connections, and closing the
		// pool waits for them: cut them off, which ends their contexts and
		// rolls back their transactions; clients retry with the same ids.
		logger.Warn("requests did not finish within the grace period; closing their connections", "error", err)
		_ = srv.Close()
	}
	select {
	case <-workerDone:
	case <-shutdownCtx.Done():
		logger.Warn("worker did not finish within the grace period")
	}
	stopBackground()
	return nil
}

const (
	// choiceFlushEvery is how often an API process adds its choice counts
	// to the database for the status page.
	choiceFlushEvery = 5 * time.Second
	// Group commit of recorded decisions (storage.GroupCommit): a decision
	// arriving with no commit under way goes at once; while one is, the
	// next batch gathers for up to the window, then commits beside it.
	// Against a fixed 1 ms window with 4 commits in flight, side by side,
	// this recorded more decisions a second for less CPU a decision, in
	// the API and in PostgreSQL (BENCHMARKS.md).
	decisionBatchWindow     = 500 * time.Microsecond
	decisionCommitsInFlight = 2
	decisionBatchMax        = 256
)

// nudge wakes the worker without blocking; one pending wake is enough.
func nudge(wake chan<- struct{}) {
	select {
	case wake <- struct{}{}:
	default:
	}
}

func every(ctx context.Context, d time.Duration, fn func()) error {
	t := time.NewTicker(d)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return nil
		case <-t.C:
			fn()
		}
	}
}
