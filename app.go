package main

import (
	"context"
	"fmt"
	"io"

	"github.com/urfave/cli/v3"

	"github.com/qtally/qtally/storage"
)

func newApp(getenv func(string) string, stdout, stderr io.Writer) *cli.Command {
	env := newFlagEnv(getenv)
	return &cli.Command{
		Name:      "qtally",
		Usage:     "learn which action to take from the outcomes of past decisions",
		Version:   versionLine(),
		Writer:    stdout,
		ErrWriter: stderr,
		Commands: []*cli.Command{
			{
				Name:  "serve",
				Usage: "run the HTTP API (and, unless --no-worker, the training worker); applies migrations first",
				Flags: append(append(serviceFlags(env, ":8080", serviceRoles{api: true, worker: true}), databaseFlag(env, true),
					&cli.BoolFlag{Name: flagNoWorker, Usage: "do not train in this process", Sources: env("QTALLY_NO_WORKER")}), authFlags(env)...),
				Action: func(ctx context.Context, cmd *cli.Command) error {
					cfg, err := readServiceConfig(cmd, serviceRoles{api: true, worker: true})
					if err != nil {
						return err
					}
					if err = readAuthConfig(cmd, &cfg); err != nil {
						return err
					}
					cfg.RunAPI, cfg.RunWorker = true, !cmd.Bool(flagNoWorker)
					logger, err := newLogger(cmd, stderr)
					if err != nil {
						return err
					}
					if _, err := storage.Migrate(ctx, cfg.DatabaseURL); err != nil {
						return err
					}
					return runService(ctx, cfg, logger, stdout)
				},
			},
			{
				Name:  "worker",
				Usage: "run the training worker only (health and metrics on --listen)",
				Flags: append(serviceFlags(env, ":8081", serviceRoles{worker: true}), databaseFlag(env, true)),
				Action: func(ctx context.Context, cmd *cli.Command) error {
					cfg, err := readServiceConfig(cmd, serviceRoles{worker: true})
					if err != nil {
						return err
					}
					cfg.RunWorker = true
					logger, err := newLogger(cmd, stderr)
					if err != nil {
						return err
					}
					return runService(ctx, cfg, logger, stdout)
				},
			},
			{
				Name:  "migrate",
				Usage: "apply pending database migrations and exit",
				Flags: []cli.Flag{databaseFlag(env, true)},
				Action: func(ctx context.Context, cmd *cli.Command) error {
					n, err := storage.Migrate(ctx, cmd.String(flagDatabaseURL))
					if err != nil {
						return err
					}
					fmt.Fprintf(stdout, "applied %d migrations; the schema is current\n", n)
					return nil
				},
			},
			devCommand(env, stdout, stderr),
			loadCommand(env, stdout, stderr),
			demoCommand(env, stdout),
			exportCommand(env, stdout),
			importCommand(env, stdout),
			tokenCommand(env, stdout),
			healthcheckCommand(env, stdout),
		},
	}
}
