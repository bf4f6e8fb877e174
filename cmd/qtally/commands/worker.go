package commands

import (
	"context"
	"io"

	"github.com/urfave/cli/v3"
)

// workerCommand runs the training worker alone, with health and metrics.
func workerCommand(env flagEnv, stdout, stderr io.Writer) *cli.Command {
	roles := serviceRoles{worker: true}
	return &cli.Command{
		Name:  "worker",
		Usage: "run the training worker only (health and metrics on --listen)",
		Flags: append(serviceFlags(env, ":8081", roles), databaseFlag(env, true)),
		Action: func(ctx context.Context, cmd *cli.Command) error {
			cfg, err := readServiceConfig(cmd, roles)
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
	}
}
