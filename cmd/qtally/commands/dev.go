package commands

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"os"
	"strings"

	"github.com/urfave/cli/v3"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/localpg"
)

const flagDataDir = "data-dir"

// devCommand runs everything on one machine for a first look: a private
// PostgreSQL (unless DATABASE_URL is set), the API and the worker.
func devCommand(env flagEnv, stdout, stderr io.Writer) *cli.Command {
	flags := append(serviceFlags(env, "127.0.0.1:8080", serviceRoles{api: true, worker: true}), databaseFlag(env, false),
		&cli.BoolFlag{Name: "demo", Usage: "also run the demo's simulated customers against this service"},
		&cli.StringFlag{Name: flagDataDir, Value: defaultDataDir(), Usage: "where the private PostgreSQL keeps its data", Sources: env("QTALLY_DATA_DIR")})
	flags = append(flags, demoFlags(env)...)
	return &cli.Command{
		Name:  "dev",
		Usage: "run API and worker on a private local PostgreSQL (started from the installed server binaries when DATABASE_URL is unset)",
		Flags: flags,
		Action: func(ctx context.Context, cmd *cli.Command) error {
			cfg, err := readServiceConfig(cmd, serviceRoles{api: true, worker: true})
			if err != nil {
				return err
			}
			cfg.RunAPI, cfg.RunWorker = true, true
			// dev is for a first look on one machine: no tokens, and it says
			// so; others cannot reach it.
			cfg.API.Auth.Off = true
			if err = requireLoopback(cfg.Process.Listen); err != nil {
				return err
			}
			if cmd.String(flagLogFormat) == "json" && !cmd.IsSet(flagLogFormat) {
				_ = cmd.Set(flagLogFormat, "text")
			}
			logger, err := newLogger(cmd, stderr)
			if err != nil {
				return err
			}
			if cfg.Storage.DatabaseURL == "" {
				fmt.Fprintf(stdout, "qtally: starting a private PostgreSQL in %s ...\n", cmd.String(flagDataDir))
				pg, err := localpg.Start(ctx, localpg.Options{Dir: cmd.String(flagDataDir), Durable: true, Port: -1})
				if errors.Is(err, localpg.ErrNoBinaries) {
					return fmt.Errorf("%w\nqtally dev needs them to run a private database, or DATABASE_URL pointing at a server you run", err)
				}
				if err != nil {
					return err
				}
				defer pg.Stop() //nolint:errcheck // on the way out: nothing is left to act on a failed stop
				cfg.Storage.DatabaseURL = pg.URL()
				fmt.Fprintf(stdout, "qtally: PostgreSQL is up: DATABASE_URL=%s\n", pg.URL())
			}
			if _, err := storage.Migrate(ctx, cfg.Storage.DatabaseURL); err != nil {
				return err
			}
			printWelcome(stdout, cfg.Process.Listen)
			if cmd.Bool("demo") {
				cfg.OnListening = func(ctx context.Context, baseURL string) {
					if err := runDemo(ctx, demoConfig(cmd, baseURL), stdout); err != nil && ctx.Err() == nil {
						logger.Error("demo stopped", "error", err)
					}
				}
			}
			return runService(ctx, cfg, logger, stdout)
		},
	}
}

// defaultDataDir is ./.qtally, except for root: then the server runs as an
// unprivileged user who must reach the directory, and a working directory
// under /root is closed to it.
func defaultDataDir() string {
	if os.Geteuid() == 0 {
		return "/var/lib/qtally/dev"
	}
	return ".qtally"
}

func printWelcome(w io.Writer, listen string) {
	host, port, err := net.SplitHostPort(listen)
	if err != nil || host == "" || host == "0.0.0.0" || host == "::" {
		host = "127.0.0.1"
	}
	base := "http://" + net.JoinHostPort(host, port)
	fmt.Fprintln(w, strings.TrimSpace(fmt.Sprintf(`
qtally: API at %[1]s, status page at %[1]s/  (stop with Ctrl-C)
Try it:
  curl -X PUT %[1]s/v1/policies/checkout -H 'Content-Type: application/json' \
       -d '{"actions":["offer_help","wait"],"alpha":0.1,"epsilon":0.1}'
  curl -X POST %[1]s/v1/policies/checkout/choose -H 'Content-Type: application/json' \
       -d '{"state":"cart_abandoned","mode":"explore"}'`, base)))
}
