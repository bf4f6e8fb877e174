package main

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"time"

	"github.com/urfave/cli/v3"

	"github.com/qtally/qtally/api"
	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/training"
)

// envSource reads a flag's value from the environment given to run, so
// tests set configuration without touching the process environment.
type envSource struct {
	key    string
	getenv func(string) string
}

func (e envSource) Lookup() (string, bool) {
	v := e.getenv(e.key)
	return v, v != ""
}
func (e envSource) String() string   { return fmt.Sprintf("environment variable %q", e.key) }
func (e envSource) GoString() string { return fmt.Sprintf("envSource{%q}", e.key) }
func (e envSource) IsFromEnv() bool  { return true }
func (e envSource) Key() string      { return e.key }

type flagEnv func(key string) cli.ValueSourceChain

func newFlagEnv(getenv func(string) string) flagEnv {
	return func(key string) cli.ValueSourceChain {
		return cli.NewValueSourceChain(envSource{key: key, getenv: getenv})
	}
}

// Flag names shared by several commands.
const (
	flagDatabaseURL    = "database-url"
	flagListen         = "listen"
	flagBatchEpisodes  = "batch-episodes"
	flagWarmPairs      = "warm-pairs"
	flagBatchTarget    = "batch-target"
	flagPollInterval   = "poll-interval"
	flagMaxBodyBytes   = "max-body-bytes"
	flagMaxEpisodes    = "max-episodes-per-request"
	flagMaxSteps       = "max-steps"
	flagMaxIDLength    = "max-id-length"
	flagMaxStateLength = "max-state-length"
	flagNoWorker       = "no-worker"
	flagShutdownGrace  = "shutdown-grace"
	flagDBMaxConns     = "db-max-conns"
	flagLogFormat      = "log-format"
	flagLogLevel       = "log-level"
	flagCoverageVisits = "coverage-visits"
	flagHistoryBucket  = "history-bucket"
	flagHistoryWindow  = "history-window"
	flagHistoryFine    = "history-fine-bucket"
	flagHistoryFineFor = "history-fine-window"
	flagPprofListen    = "pprof-listen"
	flagProblemDocs    = "problem-docs"
)

// Flags of quotas: what the service keeps per policy and in all.
const (
	flagMaxPairsPerPolicy     = "max-pairs-per-policy"
	flagMaxPolicies           = "max-policies"
	flagMaxSnapshotsPerPolicy = "max-snapshots-per-policy"
	flagMaxOpenJobsPerPolicy  = "max-open-jobs-per-policy"
)

// Flags of the HTTP server's limits on slow and idle clients.
const (
	flagReadHeaderTimeout = "read-header-timeout"
	flagReadTimeout       = "read-timeout"
	flagWriteTimeout      = "write-timeout"
	flagBulkTimeout       = "bulk-timeout"
	flagIdleTimeout       = "idle-timeout"
	flagMaxHeaderBytes    = "max-header-bytes"
)

// Flags of episode retention.
const (
	flagEpisodeRetention = "episode-retention"
	flagPruneInterval    = "prune-interval"
	flagPruneBatch       = "prune-batch"
	flagJobStaleAfter    = "job-stale-after"
)

func databaseFlag(env flagEnv, required bool) cli.Flag {
	return &cli.StringFlag{Name: flagDatabaseURL, Usage: "PostgreSQL connection URL; a password in it only through the environment (on the command line it is refused; or use PGPASSFILE); sslmode=verify-full for TLS", Sources: env("DATABASE_URL"), Required: required}
}

func logFlags(env flagEnv) []cli.Flag {
	return []cli.Flag{
		&cli.StringFlag{Name: flagLogFormat, Value: "json", Usage: "log format: json or text", Sources: env("QTALLY_LOG_FORMAT")},
		&cli.StringFlag{Name: flagLogLevel, Value: "info", Usage: "least level logged: debug (adds a line for every request), info, warn or error", Sources: env("QTALLY_LOG_LEVEL")},
	}
}

// serviceRoles are the roles a command's process may take; each reads its
// own flags, so that a command's --help lists only what it reads.
type serviceRoles struct {
	api, worker bool
}

// serviceFlags configure the API and the worker, as the roles call for.
func serviceFlags(env flagEnv, listenDefault string, roles serviceRoles) []cli.Flag {
	flags := []cli.Flag{
		&cli.StringFlag{Name: flagListen, Value: listenDefault, Usage: "HTTP listen address", Sources: env("QTALLY_LISTEN")},
		&cli.DurationFlag{Name: flagPollInterval, Value: 2 * time.Second, Usage: "fallback poll for work and changes when notifications are missed", Sources: env("QTALLY_POLL_INTERVAL")},
		&cli.DurationFlag{Name: flagReadHeaderTimeout, Value: 10 * time.Second, Usage: "time a client gets to send a request's headers", Sources: env("QTALLY_READ_HEADER_TIMEOUT")},
		&cli.DurationFlag{Name: flagReadTimeout, Value: 30 * time.Second, Usage: "time a client gets to send a whole request, body included (bulk routes get --bulk-timeout once authenticated)", Sources: env("QTALLY_READ_TIMEOUT")},
		&cli.DurationFlag{Name: flagWriteTimeout, Value: 60 * time.Second, Usage: "time from a request's headers to the end of its answer (bulk routes get --bulk-timeout once authenticated)", Sources: env("QTALLY_WRITE_TIMEOUT")},
		&cli.DurationFlag{Name: flagIdleTimeout, Value: 60 * time.Second, Usage: "how long an idle keep-alive connection stays open", Sources: env("QTALLY_IDLE_TIMEOUT")},
		&cli.IntFlag{Name: flagMaxHeaderBytes, Value: 64 << 10, Usage: "largest request line and header block accepted (bytes); larger get 431", Sources: env("QTALLY_MAX_HEADER_BYTES")},
		&cli.DurationFlag{Name: flagShutdownGrace, Value: 15 * time.Second, Usage: "time in-flight work gets to finish on shutdown", Sources: env("QTALLY_SHUTDOWN_GRACE")},
		&cli.Int32Flag{Name: flagDBMaxConns, Value: 20, Usage: "most PostgreSQL connections of this process", Sources: env("QTALLY_DB_MAX_CONNS")},
		&cli.DurationFlag{Name: flagHistoryBucket, Value: storage.DefaultHistory().Bucket, Usage: "stretch of time one row of training history sums up", Sources: env("QTALLY_HISTORY_BUCKET")},
		&cli.DurationFlag{Name: flagHistoryWindow, Value: storage.DefaultHistory().Window, Usage: "how long training history is kept", Sources: env("QTALLY_HISTORY_WINDOW")},
		&cli.DurationFlag{Name: flagHistoryFine, Value: storage.DefaultHistory().FineBucket, Usage: "stretch of time one row of recent training history sums up", Sources: env("QTALLY_HISTORY_FINE_BUCKET")},
		&cli.DurationFlag{Name: flagHistoryFineFor, Value: storage.DefaultHistory().FineWindow, Usage: "how long training history stays fine before it is rolled up into --history-bucket rows", Sources: env("QTALLY_HISTORY_FINE_WINDOW")},
		&cli.StringFlag{Name: flagPprofListen, Usage: "serve Go profiles (net/http/pprof) on this loopback address, e.g. 127.0.0.1:6060; off when empty", Sources: env("QTALLY_PPROF_LISTEN")},
		&cli.StringFlag{Name: flagProblemDocs, Value: api.DefaultProblemDocs, Usage: "address of the problem type documentation (docs/problems.md); each problem type URI is this address, # and the problem's name", Sources: env("QTALLY_PROBLEM_DOCS")},
	}
	flags = append(flags, logFlags(env)...)
	if roles.api {
		lim := training.DefaultLimits()
		flags = append(flags,
			&cli.Int64Flag{Name: flagMaxBodyBytes, Value: 16 << 20, Usage: "largest request body accepted (bytes)", Sources: env("QTALLY_MAX_BODY_BYTES")},
			&cli.IntFlag{Name: flagMaxEpisodes, Value: lim.MaxEpisodes, Usage: "most episodes in one request", Sources: env("QTALLY_MAX_EPISODES_PER_REQUEST")},
			&cli.IntFlag{Name: flagMaxSteps, Value: lim.MaxSteps, Usage: "most steps in one episode", Sources: env("QTALLY_MAX_STEPS")},
			&cli.IntFlag{Name: flagMaxIDLength, Value: lim.MaxIDLength, Usage: "longest episode id (bytes)", Sources: env("QTALLY_MAX_ID_LENGTH")},
			&cli.IntFlag{Name: flagMaxStateLength, Value: lim.MaxStateLength, Usage: "longest state name (bytes)", Sources: env("QTALLY_MAX_STATE_LENGTH")},
			&cli.Int64Flag{Name: flagCoverageVisits, Value: 10, Usage: "visits a state-action pair needs to count as covered in the coverage metric", Sources: env("QTALLY_COVERAGE_VISITS")},
			&cli.DurationFlag{Name: flagBulkTimeout, Value: 5 * time.Minute, Usage: "read and write time of authenticated bulk requests: posting episodes, importing and exporting tables (a full --max-body-bytes body needs about 8*max-body-bytes/bulk-timeout bits per second)", Sources: env("QTALLY_BULK_TIMEOUT")},
			&cli.Int64Flag{Name: flagMaxPairsPerPolicy, Value: lim.MaxPairsPerPolicy, Usage: "most states x actions a policy's max_states may allow (every API process keeps a slot per pair in memory)", Sources: env("QTALLY_MAX_PAIRS_PER_POLICY")},
			&cli.IntFlag{Name: flagMaxPolicies, Value: lim.MaxPolicies, Usage: "most policies the service holds", Sources: env("QTALLY_MAX_POLICIES")},
			&cli.IntFlag{Name: flagMaxSnapshotsPerPolicy, Value: lim.MaxSnapshotsPerPolicy, Usage: "most snapshots one policy keeps", Sources: env("QTALLY_MAX_SNAPSHOTS_PER_POLICY")},
			&cli.IntFlag{Name: flagMaxOpenJobsPerPolicy, Value: lim.MaxOpenJobsPerPolicy, Usage: "most evaluations and replays one policy may have queued or running", Sources: env("QTALLY_MAX_OPEN_JOBS_PER_POLICY")},
		)
	}
	if roles.worker {
		flags = append(flags,
			&cli.IntFlag{Name: flagBatchEpisodes, Value: 10_000, Usage: "most episodes one training transaction takes (a batch takes what is waiting, up to this)", Sources: env("QTALLY_BATCH_EPISODES")},
			&cli.DurationFlag{Name: flagBatchTarget, Value: 300 * time.Millisecond, Usage: "how long a training batch should take while training keeps up; a policy that is behind gets batches that double up to --batch-episodes (0: always up to --batch-episodes)", Sources: env("QTALLY_BATCH_TARGET")},
			&cli.IntFlag{Name: flagWarmPairs, Value: storage.DefaultWarmPairs, Usage: "estimates the worker keeps in memory between batches of the policies it trains, so it need not read them again (0: read every batch; about 65 bytes a pair)", Sources: env("QTALLY_WARM_PAIRS")},
			&cli.DurationFlag{Name: flagEpisodeRetention, Usage: "keep trained episodes this long for evaluation and replay, then delete them (0 keeps them forever; untrained episodes are always kept)", Sources: env("QTALLY_EPISODE_RETENTION")},
			&cli.DurationFlag{Name: flagPruneInterval, Value: time.Minute, Usage: "how often the worker deletes episodes older than the retention", Sources: env("QTALLY_PRUNE_INTERVAL")},
			&cli.IntFlag{Name: flagPruneBatch, Value: 1000, Usage: "most episodes one pruning transaction deletes", Sources: env("QTALLY_PRUNE_BATCH")},
			&cli.DurationFlag{Name: flagJobStaleAfter, Value: 30 * time.Second, Usage: "a background job whose runner has not reported for this long is taken over by another worker", Sources: env("QTALLY_JOB_STALE_AFTER")},
		)
	}
	return flags
}

// serviceConfig is what serve, worker and dev run with.
type serviceConfig struct {
	DatabaseURL   string
	Listen        string
	BatchEpisodes int
	WarmPairs     int
	BatchTarget   time.Duration
	PollInterval  time.Duration
	Limits        training.Limits
	HTTP          api.Config
	RunAPI        bool
	// OnListening, when set, runs in its own goroutine once the API
	// accepts connections, with the context of the service.
	OnListening   func(ctx context.Context, baseURL string)
	RunWorker     bool
	ShutdownGrace time.Duration
	DBMaxConns    int32
	// CoverageVisits is the visit count from which a pair counts as covered.
	CoverageVisits int64
	History        storage.HistorySettings

	EpisodeRetention time.Duration
	PruneInterval    time.Duration
	PruneBatch       int
	JobStaleAfter    time.Duration
	Auth             authConfig
	PprofListen      string
	Server           serverLimits
}

// serverLimits bound what slow, idle or verbose clients can hold.
type serverLimits struct {
	ReadHeaderTimeout time.Duration
	ReadTimeout       time.Duration
	WriteTimeout      time.Duration
	IdleTimeout       time.Duration
	MaxHeaderBytes    int
}

func readServiceConfig(cmd *cli.Command, roles serviceRoles) (serviceConfig, error) {
	cfg := serviceConfig{
		DatabaseURL:   cmd.String(flagDatabaseURL),
		Listen:        cmd.String(flagListen),
		PollInterval:  cmd.Duration(flagPollInterval),
		Limits:        training.DefaultLimits(),
		ShutdownGrace: cmd.Duration(flagShutdownGrace),
		DBMaxConns:    cmd.Int32(flagDBMaxConns),
		History: storage.HistorySettings{FineBucket: cmd.Duration(flagHistoryFine), FineWindow: cmd.Duration(flagHistoryFineFor),
			Bucket: cmd.Duration(flagHistoryBucket), Window: cmd.Duration(flagHistoryWindow)},
		PprofListen: cmd.String(flagPprofListen),
		Server: serverLimits{
			ReadHeaderTimeout: cmd.Duration(flagReadHeaderTimeout),
			ReadTimeout:       cmd.Duration(flagReadTimeout),
			WriteTimeout:      cmd.Duration(flagWriteTimeout),
			IdleTimeout:       cmd.Duration(flagIdleTimeout),
			MaxHeaderBytes:    cmd.Int(flagMaxHeaderBytes),
		},
	}
	cfg.HTTP = api.Config{HistoryWindow: cfg.History.Window, ProblemDocs: cmd.String(flagProblemDocs)}
	if err := api.CheckProblemDocs(cfg.HTTP.ProblemDocs); err != nil {
		return cfg, fmt.Errorf("--%s: %w", flagProblemDocs, err)
	}
	atLeastOne := map[string]int{}
	if roles.api {
		cfg.Limits = training.Limits{
			MaxEpisodes:    cmd.Int(flagMaxEpisodes),
			MaxSteps:       cmd.Int(flagMaxSteps),
			MaxIDLength:    cmd.Int(flagMaxIDLength),
			MaxStateLength: cmd.Int(flagMaxStateLength),

			MaxPairsPerPolicy:     cmd.Int64(flagMaxPairsPerPolicy),
			MaxPolicies:           cmd.Int(flagMaxPolicies),
			MaxSnapshotsPerPolicy: cmd.Int(flagMaxSnapshotsPerPolicy),
			MaxOpenJobsPerPolicy:  cmd.Int(flagMaxOpenJobsPerPolicy),
		}
		cfg.CoverageVisits = cmd.Int64(flagCoverageVisits)
		cfg.HTTP.MaxBodyBytes, cfg.HTTP.MaxStateLength = cmd.Int64(flagMaxBodyBytes), cfg.Limits.MaxStateLength
		cfg.HTTP.BulkTimeout = cmd.Duration(flagBulkTimeout)
		cfg.HTTP.MaxIDLength = cfg.Limits.MaxIDLength
		atLeastOne[flagMaxEpisodes], atLeastOne[flagMaxSteps] = cfg.Limits.MaxEpisodes, cfg.Limits.MaxSteps
		atLeastOne[flagMaxIDLength], atLeastOne[flagMaxStateLength] = cfg.Limits.MaxIDLength, cfg.Limits.MaxStateLength
		atLeastOne[flagMaxPolicies], atLeastOne[flagMaxSnapshotsPerPolicy] = cfg.Limits.MaxPolicies, cfg.Limits.MaxSnapshotsPerPolicy
		atLeastOne[flagMaxOpenJobsPerPolicy] = cfg.Limits.MaxOpenJobsPerPolicy
		if cfg.CoverageVisits < 1 {
			return cfg, fmt.Errorf("--%s must be at least 1, got %d", flagCoverageVisits, cfg.CoverageVisits)
		}
		if cfg.HTTP.MaxBodyBytes < 1024 {
			return cfg, fmt.Errorf("--%s must be at least 1024", flagMaxBodyBytes)
		}
		if cfg.Limits.MaxPairsPerPolicy < training.MaxActions {
			return cfg, fmt.Errorf("--%s must be at least %d (one state of the most actions a policy may have)", flagMaxPairsPerPolicy, training.MaxActions)
		}
		if cfg.HTTP.BulkTimeout <= 0 {
			return cfg, fmt.Errorf("--%s must be positive, got %v", flagBulkTimeout, cfg.HTTP.BulkTimeout)
		}
	}
	if roles.worker {
		cfg.BatchEpisodes = cmd.Int(flagBatchEpisodes)
		cfg.BatchTarget = cmd.Duration(flagBatchTarget)
		cfg.WarmPairs = cmd.Int(flagWarmPairs)
		cfg.EpisodeRetention = cmd.Duration(flagEpisodeRetention)
		cfg.PruneInterval = cmd.Duration(flagPruneInterval)
		cfg.PruneBatch = cmd.Int(flagPruneBatch)
		cfg.JobStaleAfter = cmd.Duration(flagJobStaleAfter)
		atLeastOne[flagBatchEpisodes], atLeastOne[flagPruneBatch] = cfg.BatchEpisodes, cfg.PruneBatch
		if cfg.EpisodeRetention < 0 || cfg.PruneInterval <= 0 {
			return cfg, fmt.Errorf("--%s must not be negative and --%s must be positive", flagEpisodeRetention, flagPruneInterval)
		}
		if cfg.JobStaleAfter < 2*jobReportInterval {
			return cfg, fmt.Errorf("--%s must be at least %v (twice the progress report interval)", flagJobStaleAfter, 2*jobReportInterval)
		}
		if cfg.BatchTarget < 0 {
			return cfg, fmt.Errorf("--%s must not be negative, got %v", flagBatchTarget, cfg.BatchTarget)
		}
		if cfg.WarmPairs < 0 {
			return cfg, fmt.Errorf("--%s must not be negative, got %d", flagWarmPairs, cfg.WarmPairs)
		}
	}
	for name, d := range map[string]time.Duration{flagReadHeaderTimeout: cfg.Server.ReadHeaderTimeout, flagReadTimeout: cfg.Server.ReadTimeout,
		flagWriteTimeout: cfg.Server.WriteTimeout, flagIdleTimeout: cfg.Server.IdleTimeout} {
		if d <= 0 {
			return cfg, fmt.Errorf("--%s must be positive, got %v", name, d)
		}
	}
	if cfg.Server.MaxHeaderBytes < 4096 {
		return cfg, fmt.Errorf("--%s must be at least 4096", flagMaxHeaderBytes)
	}
	for name, v := range atLeastOne {
		if v < 1 {
			return cfg, fmt.Errorf("--%s must be at least 1, got %d", name, v)
		}
	}
	if cfg.PollInterval <= 0 {
		return cfg, fmt.Errorf("--%s must be positive", flagPollInterval)
	}
	if err := cfg.History.Validate(); err != nil {
		return cfg, fmt.Errorf("--%s, --%s, --%s, --%s: %w", flagHistoryFine, flagHistoryFineFor, flagHistoryBucket, flagHistoryWindow, err)
	}
	return cfg, nil
}

func newLogger(cmd *cli.Command, w io.Writer) (*slog.Logger, error) {
	var level slog.Level
	if err := level.UnmarshalText([]byte(cmd.String(flagLogLevel))); err != nil {
		return nil, fmt.Errorf("--%s must be debug, info, warn or error, got %q", flagLogLevel, cmd.String(flagLogLevel))
	}
	opts := &slog.HandlerOptions{Level: level}
	switch f := cmd.String(flagLogFormat); f {
	case "json":
		return slog.New(slog.NewJSONHandler(w, opts)), nil
	case "text":
		return slog.New(slog.NewTextHandler(w, opts)), nil
	default:
		return nil, fmt.Errorf("--%s must be json or text, got %q", flagLogFormat, f)
	}
}
