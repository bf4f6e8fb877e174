package commands

import (
	"context"
	"fmt"
	"io"
	"os"

	"github.com/urfave/cli/v3"
)

// importCommand replaces a policy's live table with one read from a file.
func importCommand(env flagEnv, stdin io.Reader, stdout io.Writer) *cli.Command {
	return &cli.Command{
		Name:  "import",
		Usage: "replace a policy's live Q table with a JSON or CSV table, through the API",
		Flags: append(tableFlags(env),
			&cli.StringFlag{Name: flagInput, Aliases: []string{"i"}, Usage: "file to read (default: standard input)"}),
		Action: func(ctx context.Context, cmd *cli.Command) error {
			in := cmd.String(flagInput)
			format, err := tableFormat(cmd, in)
			if err != nil {
				return err
			}
			r := stdin
			if in != "" {
				file, openErr := os.Open(in)
				if openErr != nil {
					return openErr
				}
				defer file.Close()
				r = file
			}
			ctx, cancel := context.WithTimeout(ctx, cmd.Duration(flagTimeout))
			defer cancel()
			api, err := tableClient(cmd)
			if err != nil {
				return err
			}
			res, err := api.ImportTable(ctx, cmd.String(flagPolicy), format, r)
			if err != nil {
				return err
			}
			fmt.Fprintf(stdout, "imported %d pairs into %s; its revision is now %d, its initial value %g\n", res.Pairs, res.Policy, res.Revision, res.InitialQ)
			return nil
		},
	}
}
