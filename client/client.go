// Package client is the Go client of the qtally API, for applications and
// for qtally's own tools: choosing actions, posting finished episodes
// (directly or through a Recorder that batches them in the background),
// episodes qtally keeps open (ChooseRecorded, AddReward, EndEpisode),
// policies, tables, snapshots, evaluations and replays.
//
// Every call retries answers 429 and 503 after the time the service asks
// for in Retry-After (and transport failures of calls that are safe to
// repeat), with exponential backoff and jitter. Posting episodes is safe
// to repeat because each episode carries its own id: the service stores an
// id once and counts a second post of it as a duplicate. A recorded choose
// and an end are safe to repeat too (the service answers the recorded step
// or already_ended); a reward addition only when it carries a key. Any
// other error answer is returned as an *Error carrying the problem JSON.
//
// The package imports only the standard library.
package client

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"strings"
	"time"
)

// Options configure a Client. The zero value is usable.
type Options struct {
	// Token is sent as "Authorization: Bearer <Token>"; empty sends none
	// (a service started by `qtally dev` needs none).
	Token string
	// HTTPClient sends the requests; nil uses one with a copy of
	// http.DefaultTransport and a Timeout of 30 s. Its Timeout bounds each
	// attempt; the context of a call bounds the call with its retries.
	HTTPClient *http.Client
	// Retry says how often and how long to retry.
	Retry RetryPolicy
	// StreamThreshold is the batch size from which PostEpisodes streams
	// NDJSON instead of encoding one JSON document in memory; 0 means 1000.
	StreamThreshold int
	// PollInterval is the time between reads of a running evaluation or
	// replay; 0 means 500 ms.
	PollInterval time.Duration
}

// Client talks to one qtally service. It is safe for concurrent use.
type Client struct {
	base string
	opts Options
	http *http.Client
}

// New returns a client of the service at baseURL, such as
// http://127.0.0.1:8080.
func New(baseURL string, opts Options) (*Client, error) {
	u, err := url.Parse(baseURL)
	if err != nil {
		return nil, fmt.Errorf("qtally client: base URL: %w", err)
	}
	if (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
		return nil, fmt.Errorf("qtally client: base URL %q: want http://host:port or https://host:port", baseURL)
	}
	c := &Client{base: strings.TrimRight(baseURL, "/"), opts: opts, http: opts.HTTPClient}
	if c.http == nil {
		c.http = &http.Client{Transport: http.DefaultTransport.(*http.Transport).Clone(), Timeout: 30 * time.Second}
	}
	if c.opts.StreamThreshold <= 0 {
		c.opts.StreamThreshold = 1000
	}
	if c.opts.PollInterval <= 0 {
		c.opts.PollInterval = 500 * time.Millisecond
	}
	c.opts.Retry = c.opts.Retry.withDefaults()
	return c, nil
}

// BaseURL is the service root the client sends to.
func (c *Client) BaseURL() string { return c.base }

// call is one API request: what to send and whether it may be repeated.
type call struct {
	method, path string
	query        url.Values
	contentType  string
	// ifMatch is sent as If-Match when set.
	ifMatch string
	// body makes the request body afresh for every attempt; nil sends none.
	body func() (io.Reader, error)
	// repeatable: the request may be sent again after a 503 or a failure
	// in transit, because a second arrival changes nothing a first did not
	// (reads, PUTs, choose, episodes with their ids, ends, keyed rewards).
	// Every request is repeated after a 429, which the service answers
	// before doing anything.
	repeatable bool
	// once: the body can be read only once (a stream), so no attempt can
	// follow the first.
	once bool
}

func (cl call) url(base string) string {
	u := base + cl.path
	if len(cl.query) > 0 {
		u += "?" + cl.query.Encode()
	}
	return u
}

func jsonBody(v any) (func() (io.Reader, error), error) {
	data, err := json.Marshal(v)
	if err != nil {
		return nil, fmt.Errorf("encode request: %w", err)
	}
	return func() (io.Reader, error) { return bytes.NewReader(data), nil }, nil
}

// do sends a call, retrying as the policy allows, and returns the first
// 2xx answer with its body open; any other final answer is an *Error.
func (c *Client) do(ctx context.Context, cl call) (*http.Response, error) {
	for attempt := 1; ; attempt++ {
		resp, err := c.attempt(ctx, cl)
		var apiErr *Error
		retry := false
		switch {
		case err == nil:
			return resp, nil
		case ctx.Err() != nil:
			return nil, fmt.Errorf("%s %s: %w", cl.method, cl.path, ctx.Err())
		case errors.As(err, &apiErr):
			retry = apiErr.StatusCode == http.StatusTooManyRequests ||
				apiErr.StatusCode == http.StatusServiceUnavailable && cl.repeatable
		default:
			retry = cl.repeatable && !errors.Is(err, errBody)
		}
		if !retry || cl.once || attempt >= c.opts.Retry.MaxAttempts {
			return nil, err
		}
		var retryAfter time.Duration
		if apiErr != nil {
			retryAfter = apiErr.RetryAfter
		}
		if retryAfter > c.opts.Retry.MaxRetryAfter {
			return nil, fmt.Errorf("the service asks to wait %v, more than the client's MaxRetryAfter: %w", retryAfter, err)
		}
		wait := c.opts.Retry.wait(attempt, retryAfter)
		if f := c.opts.Retry.OnRetry; f != nil {
			ev := RetryEvent{Method: cl.method, Path: cl.path, Attempt: attempt, Wait: wait, RetryAfter: retryAfter, Err: err}
			if apiErr != nil {
				ev.Status = apiErr.StatusCode
			}
			f(ev)
		}
		if serr := sleep(ctx, wait); serr != nil {
			return nil, fmt.Errorf("%w, while waiting to retry after: %w", serr, err)
		}
	}
}

// errBody marks a failure to make the request body: repeating cannot help.
var errBody = errors.New("request body")

func (c *Client) attempt(ctx context.Context, cl call) (*http.Response, error) {
	var body io.Reader
	if cl.body != nil {
		b, err := cl.body()
		if err != nil {
			return nil, fmt.Errorf("%s %s: %w: %w", cl.method, cl.path, errBody, err)
		}
		body = b
	}
	req, err := http.NewRequestWithContext(ctx, cl.method, cl.url(c.base), body)
	if err != nil {
		if closer, ok := body.(io.Closer); ok {
			closer.Close() // ends a stream's encoder
		}
		return nil, fmt.Errorf("%s %s: %w", cl.method, cl.path, err)
	}
	if cl.contentType != "" {
		req.Header.Set("Content-Type", cl.contentType)
	}
	req.Header.Set("Accept", "application/json")
	if cl.ifMatch != "" {
		req.Header.Set("If-Match", cl.ifMatch)
	}
	if c.opts.Token != "" {
		req.Header.Set("Authorization", "Bearer "+c.opts.Token)
	}
	resp, err := c.http.Do(req)
	if err != nil {
		return nil, fmt.Errorf("%s %s: %w", cl.method, cl.path, err)
	}
	if resp.StatusCode/100 == 2 {
		return resp, nil
	}
	defer resp.Body.Close()
	data, _ := io.ReadAll(io.LimitReader(resp.Body, 4<<20))
	return nil, newError(cl.method, cl.path, resp, data)
}

// doJSON sends a call and decodes a 2xx answer into out (nil: discard).
func (c *Client) doJSON(ctx context.Context, cl call, out any) (http.Header, error) {
	resp, err := c.do(ctx, cl)
	if err != nil {
		return nil, err
	}
	defer resp.Body.Close()
	if out == nil {
		_, _ = io.Copy(io.Discard, resp.Body)
		return resp.Header, nil
	}
	if err := json.NewDecoder(resp.Body).Decode(out); err != nil {
		return nil, fmt.Errorf("%s %s: decode the answer: %w", cl.method, cl.path, err)
	}
	return resp.Header, nil
}

// sendJSON is doJSON with a JSON request body.
func (c *Client) sendJSON(ctx context.Context, method, path string, repeatable bool, in, out any) (http.Header, error) {
	body, err := jsonBody(in)
	if err != nil {
		return nil, fmt.Errorf("%s %s: %w", method, path, err)
	}
	return c.doJSON(ctx, call{method: method, path: path, contentType: "application/json", body: body, repeatable: repeatable}, out)
}

func sleep(ctx context.Context, d time.Duration) error {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-t.C:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}

// policyPath is the path of a policy's resource, with each name escaped.
func policyPath(policy string, rest ...string) string {
	p := "/v1/policies/" + url.PathEscape(policy)
	for _, r := range rest {
		p += "/" + url.PathEscape(r)
	}
	return p
}
