package commands

import (
	"context"
	"io"
	"os"

	"github.com/urfave/cli/v3"
)

// exportCommand writes a policy's live table or a snapshot to a file.
func exportCommand(env flagEnv, stdout io.Writer) *cli.Command {
	return &cli.Command{
		Name:  "export",
		Usage: "write a policy's Q table (live, or a snapshot) as JSON or CSV, through the API",
		Flags: append(tableFlags(env),
			&cli.StringFlag{Name: flagSnapshot, Usage: "export this snapshot instead of the live table"},
			&cli.StringFlag{Name: flagOutput, Aliases: []string{"o"}, Usage: "file to write (default: standard output)"}),
		Action: func(ctx context.Context, cmd *cli.Command) error {
			out := cmd.String(flagOutput)
			format, err := tableFormat(cmd, out)
			if err != nil {
				return err
			}
			w := stdout
			var file *os.File
			if out != "" {
				if file, err = os.Create(out); err != nil {
					return err
				}
				w = file
			}
			ctx, cancel := context.WithTimeout(ctx, cmd.Duration(flagTimeout))
			defer cancel()
			api, err := tableClient(cmd)
			if err == nil {
				err = api.ExportTable(ctx, cmd.String(flagPolicy), cmd.String(flagSnapshot), format, w)
			}
			if file != nil {
				if cerr := file.Close(); err == nil {
					err = cerr
				}
				if err != nil {
					_ = os.Remove(out) // leave no half-written table behind
				}
			}
			return err
		},
	}
}
