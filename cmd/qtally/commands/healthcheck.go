package commands

import (
	"context"
	"fmt"
	"io"
	"net/http"
	"strings"
	"time"

	"github.com/urfave/cli/v3"
)

// healthcheckCommand probes a qtally process over HTTP and exits 0 when it
// answers 2xx, 1 otherwise. Container images without a shell or an HTTP
// client use it for their health checks.
func healthcheckCommand(env flagEnv, stdout io.Writer) *cli.Command {
	return &cli.Command{
		Name:  "healthcheck",
		Usage: "probe a running qtally over HTTP; exit 0 when it answers 2xx, 1 otherwise",
		Flags: []cli.Flag{
			&cli.StringFlag{Name: flagAPIURL, Value: "http://127.0.0.1:8080/readyz", Usage: "URL to probe", Sources: env("QTALLY_HEALTHCHECK_URL")},
			&cli.DurationFlag{Name: flagTimeout, Value: 3 * time.Second, Usage: "how long to wait for the answer", Sources: env("QTALLY_HEALTHCHECK_TIMEOUT")},
		},
		Action: func(ctx context.Context, cmd *cli.Command) error {
			url := cmd.String(flagAPIURL)
			ctx, cancel := context.WithTimeout(ctx, cmd.Duration(flagTimeout))
			defer cancel()
			req, err := http.NewRequestWithContext(ctx, http.MethodGet, url, nil)
			if err != nil {
				return fmt.Errorf("healthcheck: --%s: %w", flagAPIURL, err)
			}
			// A redirect is not health: answer for the URL as given.
			client := &http.Client{CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
			resp, err := client.Do(req)
			if err != nil {
				return fmt.Errorf("healthcheck: %w", err)
			}
			defer resp.Body.Close()
			body, _ := io.ReadAll(io.LimitReader(resp.Body, 512))
			if resp.StatusCode < 200 || resp.StatusCode > 299 {
				return fmt.Errorf("healthcheck: %s answered %s: %s", url, resp.Status, strings.TrimSpace(string(body)))
			}
			fmt.Fprintf(stdout, "%s: %s\n", url, resp.Status)
			return nil
		},
	}
}
