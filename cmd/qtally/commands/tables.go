package commands

import (
	"fmt"
	"net/http"
	"path/filepath"
	"strings"
	"time"

	"github.com/urfave/cli/v3"

	"github.com/qtally/qtally/client"
)

// Flags of the table commands (export and import).
const (
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
		apiURLFlag(env, "http://127.0.0.1:8080", "the qtally API to talk to"),
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
