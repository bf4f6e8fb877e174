package commands

import (
	"context"
	"errors"
	"io"

	"github.com/urfave/cli/v3"

	"github.com/qtally/qtally/storage"
)

// serveCommand runs the API and, unless --no-worker, the training worker.
func serveCommand(env flagEnv, stdout, stderr io.Writer) *cli.Command {
	roles := serviceRoles{api: true, worker: true}
	return &cli.Command{
		Name:  "serve",
		Usage: "run the HTTP API (and, unless --no-worker, the training worker); applies migrations first",
		Flags: append(append(serviceFlags(env, ":8080", roles), databaseFlag(env, true),
			&cli.BoolFlag{Name: flagNoWorker, Usage: "do not train in this process", Sources: env("QTALLY_NO_WORKER")}), authFlags(env)...),
		Action: func(ctx context.Context, cmd *cli.Command) error {
			cfg, err := readServiceConfig(cmd, roles)
			if authErr := readAuthConfig(cmd, &cfg); authErr != nil {
				err = errors.Join(err, authErr)
			}
			if err != nil {
				return err
			}
			cfg.RunAPI, cfg.RunWorker = true, !cmd.Bool(flagNoWorker)
			logger, err := newLogger(cmd, stderr)
			if err != nil {
				return err
			}
			if _, err := storage.Migrate(ctx, cfg.Storage.DatabaseURL); err != nil {
				return err
			}
			return runService(ctx, cfg, logger, stdout)
		},
	}
}
