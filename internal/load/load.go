// Package load drives a running qtally with bounded, loopback-only load and
// reports throughput, latency, backlog and how fast training reaches choose.
package load

import (
	"context"
	"fmt"
	"net"
	"net/http"
	"net/url"
	"time"

	"github.com/qtally/qtally/client"
)

// Config is shared by every scenario.
type Config struct {
	BaseURL string
	Policy  string
	// Token, when set, is sent as a bearer token.
	Token string
	// Rate is requests (or episodes, for post) per second; 0 finds the
	// maximum with Workers concurrent clients.
	Rate     int
	Workers  int
	Duration time.Duration
	// States is how many distinct states the generated traffic uses.
	States int
	// Actions are the policy's actions; the scenario creates the policy.
	Actions []string
	// StepsPerEpisode and EpisodesPerPost shape posted episodes.
	StepsPerEpisode int
	EpisodesPerPost int
	Seed            uint64
	// PostgresPID, when set, is the process id of the service's PostgreSQL
	// server on this machine, whose processor time attacks then report.
	PostgresPID int
}

// DefaultConfig matches the shapes the machine's ceilings are measured with:
// 20-step episodes, 100 per request, 64 clients for choose.
func DefaultConfig() Config {
	return Config{BaseURL: "http://127.0.0.1:8080", Policy: "load", Workers: 64, Duration: 10 * time.Second,
		States: 10_000, Actions: []string{"retry_card", "wait", "email_reminder", "text_reminder"},
		StepsPerEpisode: 20, EpisodesPerPost: 100, Seed: 1}
}

// checkLoopback refuses any target that is not this machine: load must
// never leave it.
func checkLoopback(base string) error {
	u, err := url.Parse(base)
	if err != nil || u.Host == "" {
		return fmt.Errorf("load: %q is not a URL", base)
	}
	host := u.Hostname()
	if host == "localhost" {
		return nil
	}
	ip := net.ParseIP(host)
	if ip == nil || !ip.IsLoopback() {
		return fmt.Errorf("load: refusing to send load to %s: only loopback addresses (127.0.0.0/8, ::1, localhost) are allowed", host)
	}
	return nil
}

// newClient is the scenarios' API client. It does not retry: a refused
// or failed request counts as an error of the run, not as a slower answer.
func newClient(cfg Config) (*client.Client, error) {
	return client.New(cfg.BaseURL, client.Options{Token: cfg.Token, Retry: client.RetryPolicy{MaxAttempts: 1},
		HTTPClient: &http.Client{Timeout: 30 * time.Second, Transport: &http.Transport{MaxIdleConnsPerHost: 256}}})
}

// defaultMaxPairs is the service's default --max-pairs-per-policy.
const defaultMaxPairs = 1_000_000

// ensurePolicy creates the scenario's policy (or keeps it as it is).
func ensurePolicy(ctx context.Context, c *client.Client, cfg Config) error {
	if _, err := c.Policy(ctx, cfg.Policy); err == nil || client.StatusOf(err) != http.StatusNotFound {
		return err
	}
	settings := client.DefaultSettings(cfg.Actions...)
	settings.Gamma, settings.Alpha, settings.Epsilon = 0.99, 0.05, 0.1
	// As many states as the service's default pairs per policy allow
	// (--max-pairs-per-policy 1,000,000): the memory scenario fills exactly
	// that, and the sustained loop's probes add states of their own.
	settings.MaxStates = defaultMaxPairs / int64(len(cfg.Actions))
	_, _, err := c.PutPolicy(ctx, cfg.Policy, settings, "")
	if client.ProblemOf(err) == client.ProblemPreconditionRequired {
		// Another run created it since it was read.
		return nil
	}
	return err
}
