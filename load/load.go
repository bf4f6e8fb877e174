// Package load drives a running qtally with bounded, loopback-only load and
// reports throughput, latency, backlog and how fast training reaches choose.
package load

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net"
	"net/http"
	"net/url"
	"strings"
	"time"
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

// client talks JSON to the service.
type client struct {
	base  string
	token string
	http  *http.Client
}

func newClient(cfg Config) *client {
	return &client{base: strings.TrimRight(cfg.BaseURL, "/"), token: cfg.Token,
		http: &http.Client{Timeout: 30 * time.Second, Transport: &http.Transport{MaxIdleConnsPerHost: 256}}}
}

func (c *client) do(ctx context.Context, method, path string, body any, out any) (int, error) {
	var rd io.Reader
	if body != nil {
		data, err := json.Marshal(body)
		if err != nil {
			return 0, err
		}
		rd = bytes.NewReader(data)
	}
	req, err := http.NewRequestWithContext(ctx, method, c.base+path, rd)
	if err != nil {
		return 0, err
	}
	if body != nil {
		req.Header.Set("Content-Type", "application/json")
	}
	if c.token != "" {
		req.Header.Set("Authorization", "Bearer "+c.token)
	}
	resp, err := c.http.Do(req)
	if err != nil {
		return 0, err
	}
	defer resp.Body.Close()
	data, err := io.ReadAll(resp.Body)
	if err != nil {
		return resp.StatusCode, err
	}
	if resp.StatusCode >= 300 {
		return resp.StatusCode, fmt.Errorf("%s %s: %d %s", method, path, resp.StatusCode, bytes.TrimSpace(data))
	}
	if out != nil {
		return resp.StatusCode, json.Unmarshal(data, out)
	}
	return resp.StatusCode, nil
}

// ensurePolicy creates the scenario's policy (or keeps it as it is).
func (c *client) ensurePolicy(ctx context.Context, cfg Config) error {
	if status, err := c.do(ctx, http.MethodGet, "/v1/policies/"+cfg.Policy, nil, nil); err == nil && status == http.StatusOK {
		return nil
	}
	_, err := c.do(ctx, http.MethodPut, "/v1/policies/"+cfg.Policy,
		map[string]any{"actions": cfg.Actions, "gamma": 0.99, "alpha": 0.05, "epsilon": 0.1}, nil)
	return err
}

// policyStatus is the part of GET /v1/policies/{p} the scenarios read.
type policyStatus struct {
	Revision int64 `json:"revision"`
	Episodes int64 `json:"episodes"`
	Backlog  int64 `json:"backlog"`
	Pairs    int64 `json:"pairs"`
}

func (c *client) status(ctx context.Context, policy string) (policyStatus, error) {
	var st policyStatus
	_, err := c.do(ctx, http.MethodGet, "/v1/policies/"+policy, nil, &st)
	return st, err
}
