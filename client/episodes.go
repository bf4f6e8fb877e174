package client

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"iter"
	"net/http"
	"slices"
)

// Step is one decision of an episode and the reward that followed it.
type Step struct {
	State  string  `json:"state"`
	Action string  `json:"action"`
	Reward float64 `json:"reward"`
	// Probability is the chance the behaviour gave Action (the choose
	// answer's); 0 leaves it out, and the episode cannot be evaluated
	// off-policy.
	Probability float64 `json:"probability,omitempty"`
	// Allowed is the set Action was chosen from (the choose answer's); nil
	// counts every action as allowed.
	Allowed []string `json:"allowed,omitempty"`
}

// Episode is one finished episode. Its ID makes posting it idempotent: the
// service stores an id once per policy, and a second post of the same id
// counts as a duplicate, so an episode posted again after a lost answer is
// never learned twice.
type Episode struct {
	ID    string `json:"id"`
	Steps []Step `json:"steps"`
}

// IngestResult is the service's answer to a post of episodes.
type IngestResult struct {
	Accepted int `json:"accepted"`
	// Duplicates were already stored. After a retry they include episodes
	// the earlier attempt stored before its answer was lost.
	Duplicates int `json:"duplicates"`
}

// PostEpisodes posts a batch of finished episodes; the service stores all
// of them or, when any is invalid, none (an *Error lists every problem by
// episode index, step index and field). Batches of Options.StreamThreshold
// episodes or more go as NDJSON, encoded while they are sent. The service
// takes at most its --max-episodes-per-request (10000 by default) in one
// post.
func (c *Client) PostEpisodes(ctx context.Context, policy string, episodes []Episode) (IngestResult, error) {
	if len(episodes) >= c.opts.StreamThreshold {
		return c.StreamEpisodes(ctx, policy, slices.Values(episodes))
	}
	body, err := jsonBody(struct {
		Episodes []Episode `json:"episodes"`
	}{episodes})
	if err != nil {
		return IngestResult{}, err
	}
	var res IngestResult
	_, err = c.doJSON(ctx, call{method: http.MethodPost, path: policyPath(policy, "episodes"),
		contentType: "application/json", body: body, repeatable: true}, &res)
	return res, err
}

// StreamEpisodes posts episodes as NDJSON, one a line, encoding each while
// the request is sent, so the client never holds the encoded batch. A retry
// ranges over episodes again: it must yield the same episodes every time.
func (c *Client) StreamEpisodes(ctx context.Context, policy string, episodes iter.Seq[Episode]) (IngestResult, error) {
	body := func() (io.Reader, error) {
		r, w := io.Pipe()
		go func() {
			buf := bufio.NewWriterSize(w, 64<<10)
			enc := json.NewEncoder(buf)
			for ep := range episodes {
				if err := enc.Encode(ep); err != nil {
					w.CloseWithError(fmt.Errorf("encode episode %q: %w", ep.ID, err))
					return
				}
			}
			w.CloseWithError(buf.Flush())
		}()
		return r, nil
	}
	var res IngestResult
	_, err := c.doJSON(ctx, call{method: http.MethodPost, path: policyPath(policy, "episodes"),
		contentType: "application/x-ndjson", body: body, repeatable: true}, &res)
	return res, err
}
