package main

import (
	"context"
	"fmt"
	"io"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"time"

	"github.com/urfave/cli/v3"

	"github.com/qtally/qtally/client"
)

// Flags of the table commands.
const (
	flagAPIURL   = "url"
	flagPolicy   = "policy"
	flagSnapshot = "snapshot"
	flagFormat   = "format"
	flagOutput   = "output"
	flagInput    = "input"
	flagTimeout  = "timeout"
	flagToken    = "token"
)

// tableFlags are shared by export and import.
func tableFlags(env flagEnv) []cli.Flag {
	return []cli.Flag{
		&cli.StringFlag{Name: flagAPIURL, Value: "http://127.0.0.1:8080", Usage: "the qtally API to talk to", Sources: env("QTALLY_URL")},
		&cli.StringFlag{Name: flagPolicy, Usage: "policy name", Required: true},
		&cli.StringFlag{Name: flagToken, Usage: "API token with the admin scope", Sources: env("QTALLY_TOKEN")},
		&cli.StringFlag{Name: flagFormat, Usage: "json or csv (default: from the file name's extension, else json)"},
		&cli.DurationFlag{Name: flagTimeout, Value: 5 * time.Minute, Usage: "give up on the API after this long"},
	}
}

// tableFormat picks the format: the flag, else the file's extension.
func tableFormat(cmd *cli.Command, file string) (client.Format, error) {
	f := cmd.String(flagFormat)
	if f == "" {
		f = "json"
		if strings.EqualFold(filepath.Ext(file), ".csv") {
			f = "csv"
		}
	}
	if f != "json" && f != "csv" {
		return "", fmt.Errorf("--%s must be json or csv, got %q", flagFormat, f)
	}
	return client.Format(f), nil
}

// tableClient is the API client of the table commands. A large table may
// take long: --timeout bounds the whole command, not each attempt.
func tableClient(cmd *cli.Command) (*client.Client, error) {
	return client.New(cmd.String(flagAPIURL), client.Options{Token: cmd.String(flagToken), HTTPClient: &http.Client{}})
}

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

// importCommand replaces a policy's live table with one read from a file.
func importCommand(env flagEnv, stdout io.Writer) *cli.Command {
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
			var r io.Reader = os.Stdin
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
