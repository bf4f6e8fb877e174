package commands

import (
	"context"
	"errors"
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

// flagEnv makes a flag's sources: the environment variables given, the
// first one set winning (later ones are older names kept working).
type flagEnv func(keys ...string) cli.ValueSourceChain

func newFlagEnv(getenv func(string) string) flagEnv {
	return func(keys ...string) cli.ValueSourceChain {
		sources := make([]cli.ValueSource, len(keys))
		for i, k := range keys {
			sources[i] = envSource{key: k, getenv: getenv}
		}
		return cli.NewValueSourceChain(sources...)
	}
}

// Flag names shared by several commands.
const (
	flagDatabaseURL    = "database-url"
	flagListen         = "listen"
	flagBatchEpisodes  = "batch-episodes"
	flagBatchSteps     = "batch-steps"
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
	flagHeapHeadroom   = "heap-headroom"
	flagProblemDocs    = "problem-docs"
	flagAPIURL         = "url"
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

// apiURLFlag is where the client commands (export, import, load, demo)
// find the API: one flag and one variable for all of them; QTALLY_LOAD_URL
// and QTALLY_DEMO_URL, their older names, still work.
func apiURLFlag(env flagEnv, value, usage string, olderVariables ...string) cli.Flag {
	return &cli.StringFlag{Name: flagAPIURL, Value: value, Usage: usage, Sources: env(append([]string{"QTALLY_URL"}, olderVariables...)...)}
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
		&cli.Int64Flag{Name: flagHeapHeadroom, Value: 64 << 20, Usage: "bytes the heap may grow past what the last garbage collection left live before the next one runs, while the live heap is smaller than this (larger heaps get Go's default: the next collection at twice the live heap); fewer collections a second for a small process, at this much more memory (0, or GOGC in the environment: Go's default)", Sources: env("QTALLY_HEAP_HEADROOM")},
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
			&cli.IntFlag{Name: flagBatchEpisodes, Value: 50_000, Usage: "most episodes one training or replay transaction takes (a batch takes what is waiting, up to this and --batch-steps)", Sources: env("QTALLY_BATCH_EPISODES")},
			&cli.IntFlag{Name: flagBatchSteps, Value: 500_000, Usage: "a training or replay transaction takes no further episode once it holds this many steps, which bounds the worker's memory for a batch (about 150 MB at 500,000 steps; 0: no bound)", Sources: env("QTALLY_BATCH_STEPS")},
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

// serviceConfig is what serve, worker and dev run with: one part per
// component, each read from its own flags and checked on its own, and the
// roles this process takes.
type serviceConfig struct {
	RunAPI    bool
	RunWorker bool
	// OnListening, when set, runs in its own goroutine once the API
	// accepts connections, with the context of the service.
	OnListening func(ctx context.Context, baseURL string)

	Process processConfig
	Storage storageConfig
	Worker  workerConfig
	API     apiConfig
}

// processConfig is what every role's process has: its HTTP listener
// (the API, or health and metrics), profiling and shutdown.
type processConfig struct {
	Listen        string
	ShutdownGrace time.Duration
	PprofListen   string
	// HeapHeadroom is what the heap may grow past the live heap between
	// garbage collections while it is small (gcpacing); 0: Go's pacing.
	HeapHeadroom int64
	Server       serverLimits
}

// serverLimits bound what slow, idle or verbose clients can hold.
type serverLimits struct {
	ReadHeaderTimeout time.Duration
	ReadTimeout       time.Duration
	WriteTimeout      time.Duration
	IdleTimeout       time.Duration
	MaxHeaderBytes    int
}

// storageConfig is how the process reaches and keeps its PostgreSQL.
type storageConfig struct {
	DatabaseURL string
	MaxConns    int32
	History     storage.HistorySettings
}

// workerConfig is the training worker's and its housekeeping's.
type workerConfig struct {
	BatchEpisodes    int
	BatchSteps       int
	BatchTarget      time.Duration
	WarmPairs        int
	PollInterval     time.Duration
	EpisodeRetention time.Duration
	PruneInterval    time.Duration
	PruneBatch       int
	JobStaleAfter    time.Duration
}

// apiConfig is the HTTP API's: its handlers' settings, request limits and
// quotas, tokens, and how it keeps its in-memory Q copy current.
type apiConfig struct {
	HTTP   api.Config
	Limits training.Limits
	// CoverageVisits is the visit count from which a pair counts as covered.
	CoverageVisits int64
	PollInterval   time.Duration
	Auth           authConfig
}

// problems gathers every configuration problem, so that one run reports
// them all instead of the first.
type problems []error

func (p *problems) add(format string, args ...any) { *p = append(*p, fmt.Errorf(format, args...)) }

func (p *problems) positive(flag string, d time.Duration) {
	if d <= 0 {
		p.add("--%s must be positive, got %v", flag, d)
	}
}

func (p *problems) atLeast(flag string, v, least int64) {
	if v < least {
		p.add("--%s must be at least %d, got %d", flag, least, v)
	}
}

func (c processConfig) validate() error {
	var p problems
	p.positive(flagShutdownGrace, c.ShutdownGrace)
	p.positive(flagReadHeaderTimeout, c.Server.ReadHeaderTimeout)
	p.positive(flagReadTimeout, c.Server.ReadTimeout)
	p.positive(flagWriteTimeout, c.Server.WriteTimeout)
	p.positive(flagIdleTimeout, c.Server.IdleTimeout)
	p.atLeast(flagMaxHeaderBytes, int64(c.Server.MaxHeaderBytes), 4096)
	p.atLeast(flagHeapHeadroom, c.HeapHeadroom, 0)
	return errors.Join(p...)
}

func (c storageConfig) validate() error {
	var p problems
	p.atLeast(flagDBMaxConns, int64(c.MaxConns), 1)
	if err := c.History.Validate(); err != nil {
		p.add("--%s, --%s, --%s, --%s: %w", flagHistoryFine, flagHistoryFineFor, flagHistoryBucket, flagHistoryWindow, err)
	}
	return errors.Join(p...)
}

// Batch is what one training or replay transaction may take.
func (c workerConfig) Batch() training.BatchLimits {
	return training.BatchLimits{Episodes: c.BatchEpisodes, Steps: c.BatchSteps}
}

func (c workerConfig) validate() error {
	var p problems
	p.atLeast(flagBatchEpisodes, int64(c.BatchEpisodes), 1)
	p.atLeast(flagBatchSteps, int64(c.BatchSteps), 0)
	p.atLeast(flagPruneBatch, int64(c.PruneBatch), 1)
	p.positive(flagPollInterval, c.PollInterval)
	p.positive(flagPruneInterval, c.PruneInterval)
	if c.EpisodeRetention < 0 {
		p.add("--%s must not be negative, got %v", flagEpisodeRetention, c.EpisodeRetention)
	}
	if c.JobStaleAfter < 2*jobReportInterval {
		p.add("--%s must be at least %v (twice the progress report interval), got %v", flagJobStaleAfter, 2*jobReportInterval, c.JobStaleAfter)
	}
	if c.BatchTarget < 0 {
		p.add("--%s must not be negative, got %v", flagBatchTarget, c.BatchTarget)
	}
	if c.WarmPairs < 0 {
		p.add("--%s must not be negative, got %d", flagWarmPairs, c.WarmPairs)
	}
	return errors.Join(p...)
}

func (c apiConfig) validate() error {
	var p problems
	p.positive(flagPollInterval, c.PollInterval)
	p.atLeast(flagCoverageVisits, c.CoverageVisits, 1)
	p.atLeast(flagMaxBodyBytes, c.HTTP.MaxBodyBytes, 1024)
	p.positive(flagBulkTimeout, c.HTTP.BulkTimeout)
	lim := c.Limits
	for _, f := range []struct {
		flag  string
		value int
	}{{flagMaxEpisodes, lim.MaxEpisodes}, {flagMaxSteps, lim.MaxSteps}, {flagMaxIDLength, lim.MaxIDLength},
		{flagMaxStateLength, lim.MaxStateLength}, {flagMaxPolicies, lim.MaxPolicies},
		{flagMaxSnapshotsPerPolicy, lim.MaxSnapshotsPerPolicy}, {flagMaxOpenJobsPerPolicy, lim.MaxOpenJobsPerPolicy}} {
		p.atLeast(f.flag, int64(f.value), 1)
	}
	if lim.MaxPairsPerPolicy < training.MaxActions {
		p.add("--%s must be at least %d (one state of the most actions a policy may have), got %d", flagMaxPairsPerPolicy, training.MaxActions, lim.MaxPairsPerPolicy)
	}
	return errors.Join(p...)
}

// readServiceConfig reads the parts of the roles given and reports every
// problem of every part at once.
func readServiceConfig(cmd *cli.Command, roles serviceRoles) (serviceConfig, error) {
	cfg := serviceConfig{
		Process: processConfig{
			Listen:        cmd.String(flagListen),
			ShutdownGrace: cmd.Duration(flagShutdownGrace),
			PprofListen:   cmd.String(flagPprofListen),
			HeapHeadroom:  cmd.Int64(flagHeapHeadroom),
			Server: serverLimits{
				ReadHeaderTimeout: cmd.Duration(flagReadHeaderTimeout),
				ReadTimeout:       cmd.Duration(flagReadTimeout),
				WriteTimeout:      cmd.Duration(flagWriteTimeout),
				IdleTimeout:       cmd.Duration(flagIdleTimeout),
				MaxHeaderBytes:    cmd.Int(flagMaxHeaderBytes),
			},
		},
		Storage: storageConfig{
			DatabaseURL: cmd.String(flagDatabaseURL),
			MaxConns:    cmd.Int32(flagDBMaxConns),
			History: storage.HistorySettings{FineBucket: cmd.Duration(flagHistoryFine), FineWindow: cmd.Duration(flagHistoryFineFor),
				Bucket: cmd.Duration(flagHistoryBucket), Window: cmd.Duration(flagHistoryWindow)},
		},
		// A worker's health server answers problems too.
		API: apiConfig{Limits: training.DefaultLimits(),
			HTTP: api.Config{HistoryWindow: cmd.Duration(flagHistoryWindow), ProblemDocs: cmd.String(flagProblemDocs)}},
	}
	errs := []error{cfg.Process.validate(), cfg.Storage.validate()}
	if err := api.CheckProblemDocs(cfg.API.HTTP.ProblemDocs); err != nil {
		errs = append(errs, fmt.Errorf("--%s: %w", flagProblemDocs, err))
	}
	if roles.api {
		cfg.API.HTTP.MaxBodyBytes, cfg.API.HTTP.BulkTimeout = cmd.Int64(flagMaxBodyBytes), cmd.Duration(flagBulkTimeout)
		cfg.API = apiConfig{
			HTTP: cfg.API.HTTP,
			Limits: training.Limits{
				MaxEpisodes:    cmd.Int(flagMaxEpisodes),
				MaxSteps:       cmd.Int(flagMaxSteps),
				MaxIDLength:    cmd.Int(flagMaxIDLength),
				MaxStateLength: cmd.Int(flagMaxStateLength),

				MaxPairsPerPolicy:     cmd.Int64(flagMaxPairsPerPolicy),
				MaxPolicies:           cmd.Int(flagMaxPolicies),
				MaxSnapshotsPerPolicy: cmd.Int(flagMaxSnapshotsPerPolicy),
				MaxOpenJobsPerPolicy:  cmd.Int(flagMaxOpenJobsPerPolicy),
			},
			CoverageVisits: cmd.Int64(flagCoverageVisits),
			PollInterval:   cmd.Duration(flagPollInterval),
		}
		cfg.API.HTTP.MaxStateLength, cfg.API.HTTP.MaxIDLength = cfg.API.Limits.MaxStateLength, cfg.API.Limits.MaxIDLength
		errs = append(errs, cfg.API.validate())
	}
	if roles.worker {
		cfg.Worker = workerConfig{
			BatchEpisodes:    cmd.Int(flagBatchEpisodes),
			BatchSteps:       cmd.Int(flagBatchSteps),
			BatchTarget:      cmd.Duration(flagBatchTarget),
			WarmPairs:        cmd.Int(flagWarmPairs),
			PollInterval:     cmd.Duration(flagPollInterval),
			EpisodeRetention: cmd.Duration(flagEpisodeRetention),
			PruneInterval:    cmd.Duration(flagPruneInterval),
			PruneBatch:       cmd.Int(flagPruneBatch),
			JobStaleAfter:    cmd.Duration(flagJobStaleAfter),
		}
		errs = append(errs, cfg.Worker.validate())
	}
	return cfg, joinDistinct(errs...)
}

// joinDistinct joins problems, each once: a flag two roles read (the poll
// interval) is reported once however many components check it.
func joinDistinct(errs ...error) error {
	var out []error
	seen := map[string]bool{}
	var add func(err error)
	add = func(err error) {
		if joined, ok := err.(interface{ Unwrap() []error }); ok {
			for _, e := range joined.Unwrap() {
				add(e)
			}
			return
		}
		if err != nil && !seen[err.Error()] {
			seen[err.Error()] = true
			out = append(out, err)
		}
	}
	for _, err := range errs {
		add(err)
	}
	return errors.Join(out...)
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
