package commands

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"maps"
	"net"
	"net/http"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/qtally/qtally/api"
	"github.com/qtally/qtally/internal/access"
	"github.com/qtally/qtally/internal/gcpacing"
	"github.com/qtally/qtally/internal/metrics"
	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/training"
)

// minBatchEpisodes is the smallest batch limit while training keeps up:
// below it, a batch's fixed costs (its round trips and durable commit)
// outweigh its episodes.
const minBatchEpisodes = 100

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
	// Ends of open episodes commit one batch at a time: each holds its
	// policy's ingest lock until it commits, so two at once would only
	// queue for it. Ends arriving meanwhile gather, up to endBatchMax.
	endBatchMax = 256
)

// keptEpisodes serves the open-episode routes: reward additions and ends
// go through the batchers that commit concurrent ones together, reads to
// the database. (Reward additions are gathered as decisions are.)
type keptEpisodes struct {
	*storage.DB
	ender    *storage.EndBatcher
	rewarder *storage.RewardBatcher
}

func (k keptEpisodes) AddReward(ctx context.Context, policy, episode string, add training.RewardAddition) (training.RewardResult, error) {
	return k.rewarder.AddReward(ctx, policy, episode, add)
}

func (k keptEpisodes) EndOpenEpisode(ctx context.Context, policy, episode string, req training.EndRequest) (training.EndResult, error) {
	return k.ender.EndOpenEpisode(ctx, policy, episode, req)
}

// runService runs the API, the worker, or both, until ctx ends, then shuts
// down within the grace period: in-flight requests finish and the worker
// commits or rolls back its batch.
func runService(ctx context.Context, cfg serviceConfig, logger *slog.Logger, stdout io.Writer) error {
	db, err := openStorage(ctx, cfg)
	if err != nil {
		return err
	}
	defer db.Close()
	reg := prometheus.NewRegistry()
	m := metrics.New(reg)
	loops := newBackgroundLoops(ctx, logger)
	defer loops.stop()

	if cfg.Process.HeapHeadroom > 0 && !gcpacing.Chosen() {
		loops.Go("garbage collection pacing", func(ctx context.Context) error {
			return gcpacing.KeepHeadroom(ctx, uint64(cfg.Process.HeapHeadroom))
		})
	}
	if cfg.Process.PprofListen != "" {
		l, err := listenProfiling(cfg.Process.PprofListen)
		if err != nil {
			return err
		}
		loops.Go("profiling server", func(ctx context.Context) error { return serveProfiling(ctx, l, stdout) })
	}
	subs := map[string]storage.Subscription{}
	var handler http.Handler
	if cfg.RunAPI {
		role := startAPI(ctx, cfg.API, db, reg, m, loops, logger, stdout)
		maps.Copy(subs, role.subscriptions)
		handler = role.handler
	} else {
		handler = api.NewHealthServer(cfg.API.HTTP, api.Deps{Logger: logger, Ready: db, Metrics: m, Gatherer: reg})
	}
	workerDone := make(chan struct{})
	if cfg.RunWorker {
		maps.Copy(subs, startWorker(ctx, cfg, db, reg, m, loops, logger, workerDone))
	} else {
		close(workerDone)
	}
	loops.Go("notification listener", func(ctx context.Context) error { return db.Listen(ctx, logger, subs) })
	return serveAndDrain(ctx, cfg, handler, workerDone, loops, logger, stdout)
}

// openStorage connects to PostgreSQL with the settings of the roles.
func openStorage(ctx context.Context, cfg serviceConfig) (*storage.DB, error) {
	db, err := storage.Open(ctx, cfg.Storage.DatabaseURL, cfg.Storage.MaxConns, cfg.API.Limits)
	if err != nil {
		return nil, err
	}
	if err := db.SetHistory(cfg.Storage.History); err != nil {
		db.Close()
		return nil, err
	}
	db.SetWarmPairs(cfg.Worker.WarmPairs)
	if cfg.Worker.BatchTarget > 0 {
		db.SetBatchSizer(&training.BatchSizer{Target: cfg.Worker.BatchTarget, Min: minBatchEpisodes})
	}
	return db, nil
}

// apiRole is a started API: its handler and the notifications it needs.
type apiRole struct {
	handler       http.Handler
	subscriptions map[string]storage.Subscription
}

// startAPI starts what an API process runs besides its handlers: the
// in-memory Q copy kept current, the choice tally's flushes, the decision
// recorder and the token keyring.
func startAPI(ctx context.Context, cfg apiConfig, db *storage.DB, reg *prometheus.Registry, m *metrics.Metrics,
	loops *backgroundLoops, logger *slog.Logger, stdout io.Writer) apiRole {
	replica := training.NewReplica(db)
	reg.MustRegister(metrics.NewReplicaCollector(replica, cfg.CoverageVisits))
	subs := map[string]storage.Subscription{
		storage.ChannelPolicy: {
			Notify: func(id int32) {
				if err := replica.Refresh(loops.ctx, id); err != nil {
					logger.Warn("refreshing in-memory Q", "policy_id", id, "error", err)
				}
			},
			CatchUp: func() {
				if err := replica.RefreshAll(loops.ctx); err != nil {
					logger.Warn("catching up on Q changes", "error", err)
				}
			},
		},
	}
	loops.Go("choice counts", func(ctx context.Context) error {
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
	loops.Go("replica poll", func(ctx context.Context) error {
		return every(ctx, cfg.PollInterval, func() {
			if err := replica.RefreshAll(ctx); err != nil {
				logger.Warn("polling for Q changes", "error", err)
			}
		})
	})
	var auth api.Authenticator
	var sessions api.PageSessions
	if keyring, tokenSubs := startKeyring(ctx, cfg.Auth, db, loops, logger, stdout); keyring != nil {
		auth = keyring
		sessions = access.PageSessions{Store: db, Tokens: keyring, Life: pageSessionLife, Key: access.SessionKey(cfg.Auth.Pepper)}
		maps.Copy(subs, tokenSubs)
	}
	batcher := db.NewDecisionBatcher(storage.GroupCommit{MaxBatch: decisionBatchMax, InFlight: decisionCommitsInFlight, Window: decisionBatchWindow})
	batcher.Observe = m.Open.ObserveDecisionBatch
	loops.Go("decision recorder", batcher.Run)
	ender := db.NewEndBatcher(storage.GroupCommit{MaxBatch: endBatchMax, InFlight: 1})
	loops.Go("episode ender", ender.Run)
	rewarder := db.NewRewardBatcher(storage.GroupCommit{MaxBatch: decisionBatchMax, InFlight: decisionCommitsInFlight, Window: decisionBatchWindow})
	loops.Go("reward adder", rewarder.Run)
	handler := api.NewServer(cfg.HTTP, api.Deps{Logger: logger, Policies: db, History: db, Eraser: db, Episodes: db, States: db,
		Chooser: replica, Recorder: training.Keeper{Replica: replica, Recorder: batcher}, OpenEpisodes: keptEpisodes{DB: db, ender: ender, rewarder: rewarder}, Reports: db, Ready: db,
		Metrics: m, Gatherer: reg, Auth: auth, Sessions: sessions,
		Snapshots: db, Tables: training.Tables{Store: db, Replica: replica, Logger: logger}, Jobs: db, Audit: db})
	return apiRole{handler: handler, subscriptions: subs}
}

// startWorker starts training and its housekeeping; done closes when the
// worker has stopped (its last batch committed or rolled back). It returns
// the notifications the worker needs.
func startWorker(ctx context.Context, cfg serviceConfig, db *storage.DB, reg prometheus.Registerer, m *metrics.Metrics,
	loops *backgroundLoops, logger *slog.Logger, done chan<- struct{}) map[string]storage.Subscription {
	wake := make(chan struct{}, 1)
	subs := map[string]storage.Subscription{
		storage.ChannelEpisodes: {Notify: func(int32) { nudge(wake) }, CatchUp: func() { nudge(wake) }},
	}
	reg.MustRegister(metrics.NewBacklogCollector(db, 5*time.Second, logger))
	reg.MustRegister(metrics.NewOpenEpisodeCollector(db, 5*time.Second, logger))
	maps.Copy(subs, startHousekeeping(cfg.Worker, db, reg, m, logger, loops))
	w := &training.Worker{
		Store: db, Batch: cfg.Worker.Batch(), Wake: wake, PollInterval: cfg.Worker.PollInterval,
		BatchTimeout: cfg.Process.ShutdownGrace, OnBatch: m.ObserveBatch, Logger: logger,
		OnError: func(error) { m.TrainingErrors.Inc() },
	}
	// The worker stops with ctx, not with the background loops: a batch
	// under way commits within the grace period.
	go func() {
		defer close(done)
		if err := w.Run(ctx); err != nil {
			logger.Error("worker stopped", "error", err)
		}
	}()
	return subs
}

// serveAndDrain serves handler until ctx ends, then lets requests in flight
// and the worker finish within the grace period.
func serveAndDrain(ctx context.Context, cfg serviceConfig, handler http.Handler, workerDone <-chan struct{},
	loops *backgroundLoops, logger *slog.Logger, stdout io.Writer) error {
	pc := cfg.Process
	listener, err := net.Listen("tcp", pc.Listen)
	if err != nil {
		return fmt.Errorf("listen on %s: %w", pc.Listen, err)
	}
	fmt.Fprintf(stdout, "qtally: listening on http://%s\n", listener.Addr())
	if cfg.OnListening != nil {
		loops.Go("on listening", func(context.Context) error {
			cfg.OnListening(ctx, "http://"+listener.Addr().String())
			return nil
		})
	}
	srv := &http.Server{Handler: handler, ReadHeaderTimeout: pc.Server.ReadHeaderTimeout, ReadTimeout: pc.Server.ReadTimeout,
		WriteTimeout: pc.Server.WriteTimeout, IdleTimeout: pc.Server.IdleTimeout, MaxHeaderBytes: pc.Server.MaxHeaderBytes}
	serveErr := make(chan error, 1)
	go func() { serveErr <- srv.Serve(listener) }()

	select {
	case err := <-serveErr:
		return fmt.Errorf("http server: %w", err)
	case <-ctx.Done():
	}
	logger.Info("shutting down", "grace", pc.ShutdownGrace)
	shutdownCtx, cancel := context.WithTimeout(context.Background(), pc.ShutdownGrace)
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
	return nil
}

// backgroundLoops are a process's named loops besides serving: each runs
// until stop (which waits for all of them), and one that ends with an
// error is logged by its name. They outlive the request context so that
// they serve the requests still draining after shutdown begins.
type backgroundLoops struct {
	ctx    context.Context
	cancel context.CancelFunc
	wg     sync.WaitGroup
	logger *slog.Logger
}

func newBackgroundLoops(ctx context.Context, logger *slog.Logger) *backgroundLoops {
	loopCtx, cancel := context.WithCancel(context.WithoutCancel(ctx))
	return &backgroundLoops{ctx: loopCtx, cancel: cancel, logger: logger}
}

// Go runs fn as the loop called name.
func (b *backgroundLoops) Go(name string, fn func(context.Context) error) {
	b.wg.Go(func() {
		if err := fn(b.ctx); err != nil {
			b.logger.Error("background task stopped", "task", name, "error", err)
		}
	})
}

// stop ends every loop and waits for them.
func (b *backgroundLoops) stop() {
	b.cancel()
	b.wg.Wait()
}

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
