package commands

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"os"
	"os/exec"
	"slices"
	"strings"
	"time"

	"github.com/urfave/cli/v3"

	"github.com/qtally/qtally/internal/load"
)

// loadCommand drives a running qtally on this machine with bounded load.
func loadCommand(env flagEnv, getenv func(string) string, stdout, stderr io.Writer) *cli.Command {
	def := load.DefaultConfig()
	pprofURLFlag := &cli.StringFlag{Name: "pprof-url", Usage: "profiling server of the API process (its --pprof-listen), to read its memory"}
	keepEpisodesFlag := &cli.BoolFlag{Name: "keep-episodes", Usage: "let qtally keep the episodes: record every step's choose, add its reward, end the episode (instead of posting it)"}
	goClientFlag := &cli.BoolFlag{Name: "go-client", Usage: "simulated clients send with Go's http.Client instead of hand-formatted requests on kept-alive connections (for comparison: it costs the load generator about as much per request as the service)"}
	common := []cli.Flag{
		apiURLFlag(env, def.BaseURL, "base URL of the qtally to load (loopback only)", "QTALLY_LOAD_URL"),
		&cli.StringFlag{Name: "policy", Value: def.Policy, Usage: "policy to create and load"},
		&cli.StringFlag{Name: "token", Usage: "API token", Sources: env("QTALLY_TOKEN")},
		&cli.IntFlag{Name: "rate", Usage: "requests per second (episodes per second for mixed); 0 finds the maximum"},
		&cli.IntFlag{Name: "workers", Value: def.Workers, Usage: "concurrent clients (connections)"},
		&cli.DurationFlag{Name: "duration", Value: def.Duration, Usage: "how long to load (at most 30m)"},
		&cli.IntFlag{Name: "states", Value: def.States, Usage: "distinct states in the traffic"},
		&cli.IntFlag{Name: "steps", Value: def.StepsPerEpisode, Usage: "steps per episode"},
		&cli.IntFlag{Name: "episodes-per-post", Value: def.EpisodesPerPost, Usage: "episodes per POST"},
		&cli.BoolFlag{Name: "json", Usage: "print figures as JSON"},
		&cli.IntFlag{Name: "postgres-pid", Usage: "process id of the service's PostgreSQL server on this machine: attacks report its processor time a request"},
	}
	config := func(cmd *cli.Command) load.Config {
		cfg := def
		cfg.BaseURL, cfg.Policy, cfg.Token = cmd.String(flagAPIURL), cmd.String("policy"), cmd.String("token")
		cfg.Rate, cfg.Workers, cfg.Duration = cmd.Int("rate"), cmd.Int("workers"), cmd.Duration("duration")
		cfg.States, cfg.StepsPerEpisode, cfg.EpisodesPerPost = cmd.Int("states"), cmd.Int("steps"), cmd.Int("episodes-per-post")
		cfg.PostgresPID = cmd.Int("postgres-pid")
		return cfg
	}
	show := func(cmd *cli.Command, v any) error {
		if cmd.Bool("json") {
			enc := json.NewEncoder(stdout)
			enc.SetIndent("", "  ")
			return enc.Encode(v)
		}
		_, err := fmt.Fprintf(stdout, "%+v\n", v)
		return err
	}
	return &cli.Command{
		Name:  "load",
		Usage: "drive a running qtally on this machine with bounded load and report figures",
		Commands: []*cli.Command{
			{Name: "choose", Usage: "explore-mode choose requests only", Flags: common,
				Action: func(ctx context.Context, cmd *cli.Command) error {
					f, err := load.Choose(ctx, config(cmd))
					if err != nil {
						return err
					}
					return show(cmd, f)
				}},
			{Name: "recorded-choose", Usage: "explore-mode choose requests that each record their decision in an open episode (durable, group-committed)", Flags: common,
				Action: func(ctx context.Context, cmd *cli.Command) error {
					f, err := load.RecordedChoose(ctx, config(cmd))
					if err != nil {
						return err
					}
					return show(cmd, f)
				}},
			{Name: "post", Usage: "episode posts only (episodes-per-post episodes of steps steps each)", Flags: common,
				Action: func(ctx context.Context, cmd *cli.Command) error {
					f, err := load.Post(ctx, config(cmd))
					if err != nil {
						return err
					}
					return show(cmd, f)
				}},
			{Name: "mixed", Usage: "simulated clients choose during episodes and post them as they end, at --rate episodes/s (a worker must run)",
				Flags: append(common, &cli.IntFlag{Name: "choose-every", Value: 1, Usage: "choose at every n-th step (1: every step)"},
					&cli.IntFlag{Name: "posters", Value: 16, Usage: "posts of finished episodes under way at once"},
					keepEpisodesFlag, goClientFlag, databaseFlag(env, false), pprofURLFlag),
				Action: func(ctx context.Context, cmd *cli.Command) error {
					opt := load.MixedOptions{ChooseEvery: cmd.Int("choose-every"), Posters: cmd.Int("posters"),
						KeepEpisodes: cmd.Bool(keepEpisodesFlag.Name), GoClient: cmd.Bool(goClientFlag.Name)}
					if u := cmd.String(flagDatabaseURL); u != "" {
						obs, err := openObserver(ctx, u, stderr)
						if err != nil {
							return err
						}
						defer obs.Close()
						opt.Observer = obs
					}
					if u := cmd.String(pprofURLFlag.Name); u != "" {
						proc, err := load.NewProcess(u, cmd.String(flagAPIURL))
						if err != nil {
							return err
						}
						opt.Process = proc
					}
					r, err := load.Mixed(ctx, config(cmd), opt)
					if err != nil {
						return err
					}
					return show(cmd, r)
				}},
			{Name: "sustain", Usage: "the highest episode rate at which the whole loop keeps up: mixed runs of --duration each from --rate episodes/s, doubling, halving and bisecting over --trials runs; each measures arrival to served (a worker must run)",
				Flags: append(common, &cli.IntFlag{Name: "choose-every", Value: 1, Usage: "choose at every n-th step (1: every step)"},
					&cli.IntFlag{Name: "posters", Value: 16, Usage: "posts of finished episodes under way at once"},
					&cli.IntFlag{Name: "trials", Value: 6, Usage: "rates to try"},
					&cli.DurationFlag{Name: "drain-within", Value: 5 * time.Minute, Usage: "longest wait for the backlog to empty between trials"},
					keepEpisodesFlag, goClientFlag, databaseFlag(env, false)),
				Action: func(ctx context.Context, cmd *cli.Command) error {
					opt := load.SustainOptions{Trials: cmd.Int("trials"), Drain: cmd.Duration("drain-within"),
						Mixed: load.MixedOptions{ChooseEvery: cmd.Int("choose-every"), Posters: cmd.Int("posters"),
							KeepEpisodes: cmd.Bool(keepEpisodesFlag.Name), GoClient: cmd.Bool(goClientFlag.Name)}}
					if u := cmd.String(flagDatabaseURL); u != "" {
						obs, err := openObserver(ctx, u, stderr)
						if err != nil {
							return err
						}
						defer obs.Close()
						opt.Mixed.Observer = obs
					}
					r, err := load.Sustain(ctx, config(cmd), opt)
					if err != nil {
						return err
					}
					return show(cmd, r)
				}},
			{Name: "memory", Usage: "fill a fresh policy with --pairs trained pairs (a worker must run), then measure what loading it into the API process costs",
				Flags: append(common, &cli.IntFlag{Name: "pairs", Value: 1_000_000, Usage: "distinct pairs to train"}, pprofURLFlag),
				Action: func(ctx context.Context, cmd *cli.Command) error {
					if cmd.String(pprofURLFlag.Name) == "" {
						return fmt.Errorf("--%s is required: the address the API process serves profiles on (its --pprof-listen)", pprofURLFlag.Name)
					}
					proc, err := load.NewProcess(cmd.String(pprofURLFlag.Name), cmd.String(flagAPIURL))
					if err != nil {
						return err
					}
					r, err := load.Memory(ctx, config(cmd), cmd.Int("pairs"), proc)
					if err != nil {
						return err
					}
					return show(cmd, r)
				}},
			{Name: "wait", Usage: "wait until the policy has no untrained episodes (at most --duration)", Flags: common,
				Action: func(ctx context.Context, cmd *cli.Command) error {
					r, err := load.Wait(ctx, config(cmd), cmd.Duration("duration"))
					if err != nil {
						return err
					}
					return show(cmd, r)
				}},
			{Name: "report", Usage: "print the table of figures, ceilings and ratios of a scripts/bench.sh run directory",
				Flags: []cli.Flag{&cli.StringFlag{Name: "dir", Required: true, Usage: "the run directory"}},
				Action: func(ctx context.Context, cmd *cli.Command) error {
					table, err := load.Report(cmd.String("dir"))
					if err != nil {
						return err
					}
					_, err = io.WriteString(stdout, table)
					return err
				}},
			{Name: "drain", Usage: "store --episodes with training paused (the service runs --no-worker), then start a worker and time the drain",
				Flags: append(common, &cli.IntFlag{Name: "episodes", Value: 50_000, Usage: "backlog to store"},
					databaseFlag(env, true)),
				Action: func(ctx context.Context, cmd *cli.Command) error {
					databaseURL := cmd.String(flagDatabaseURL)
					obs, err := openObserver(ctx, databaseURL, stderr)
					if err != nil {
						return err
					}
					defer obs.Close()
					r, err := load.Drain(ctx, config(cmd), cmd.Int("episodes"), func() (func(), error) {
						return startWorkerProcess(databaseURL, workerEnvironment(env, getenv))
					}, obs)
					if err != nil {
						return err
					}
					return show(cmd, r)
				}},
		},
	}
}

// libpqVariables are the environment variables pgx reads besides the URL
// (passwords files, TLS material, defaults): a worker child gets them too.
var libpqVariables = []string{"HOME", "PGHOST", "PGPORT", "PGDATABASE", "PGUSER", "PGPASSWORD", "PGPASSFILE", "PGSERVICE",
	"PGSERVICEFILE", "PGSSLMODE", "PGSSLCERT", "PGSSLKEY", "PGSSLROOTCERT", "PGSSLPASSWORD", "PGAPPNAME",
	"PGCONNECT_TIMEOUT", "PGTARGETSESSIONATTRS", "PGTZ", "PGOPTIONS"}

// workerEnvironment is the environment of a worker child process: the
// variables the worker command's flags and pgx read, from the environment
// given to Run (not the process's own), so that a test's settings reach it.
func workerEnvironment(env flagEnv, getenv func(string) string) []string {
	keys := slices.Clone(libpqVariables)
	for _, f := range workerCommand(env, io.Discard, io.Discard).Flags {
		if withEnv, ok := f.(interface{ GetEnvVars() []string }); ok {
			keys = append(keys, withEnv.GetEnvVars()...)
		}
	}
	var vars []string
	for _, k := range keys {
		if v := getenv(k); v != "" {
			vars = append(vars, k+"="+v)
		}
	}
	return vars
}

// startWorkerProcess runs this binary's worker against databaseURL.
func startWorkerProcess(databaseURL string, environment []string) (func(), error) {
	self, err := os.Executable()
	if err != nil {
		return nil, err
	}
	cmd := exec.Command(self, "worker")
	cmd.Env = append(environment, "DATABASE_URL="+databaseURL, "QTALLY_LISTEN=127.0.0.1:0")
	var logs strings.Builder
	cmd.Stderr = &logs
	if err := cmd.Start(); err != nil {
		return nil, fmt.Errorf("start worker: %w", err)
	}
	return func() {
		_ = cmd.Process.Signal(os.Interrupt)
		done := make(chan struct{})
		go func() { _ = cmd.Wait(); close(done) }()
		select {
		case <-done:
		case <-time.After(15 * time.Second):
			_ = cmd.Process.Kill()
		}
	}, nil
}
