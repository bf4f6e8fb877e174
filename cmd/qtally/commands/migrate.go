package commands

import (
	"context"
	"fmt"
	"io"

	"github.com/urfave/cli/v3"

	"github.com/qtally/qtally/storage"
)

func migrateCommand(env flagEnv, stdout io.Writer) *cli.Command {
	return &cli.Command{
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
	}
}
