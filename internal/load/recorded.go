package load

import (
	"context"
	"fmt"
	"net/http"
	"strconv"
	"sync/atomic"
	"time"

	vegeta "github.com/tsenart/vegeta/v12/lib"
)

// recordedEpisodes is how many open episodes the recorded scenario spreads
// its decisions over. Request i is step i / recordedEpisodes of episode
// i % recordedEpisodes, so a step is sent only after a thousand other
// requests, long after the step before it was answered (with at most
// Workers requests under way), as an application's would be; the first
// thousand requests of a run open the episodes.
const recordedEpisodes = 1024

// RecordedChoose attacks the choose route with explore requests that each
// record their decision in an open episode (see the open-episodes routes):
// every answer waits for a durable group commit.
func RecordedChoose(ctx context.Context, cfg Config) (Figures, error) {
	c, err := prepare(ctx, cfg)
	if err != nil {
		return Figures{}, err
	}
	if cfg.Workers >= recordedEpisodes {
		return Figures{}, fmt.Errorf("load: recorded choose needs fewer than %d workers", recordedEpisodes)
	}
	g := newGenerator(cfg, "recorded")
	target := c.BaseURL() + "/v1/policies/" + cfg.Policy + "/choose"
	header := jsonHeader(cfg.Token)
	run := strconv.FormatInt(time.Now().UnixNano(), 36)
	var n atomic.Uint64
	next := func(t *vegeta.Target) error {
		i := n.Add(1) - 1
		episode, step := i%recordedEpisodes, i/recordedEpisodes
		t.Method, t.URL, t.Header = http.MethodPost, target, header
		t.Body = fmt.Appendf(nil, `{"state":%q,"mode":"explore","episode":"%s-%d","step":%d}`,
			g.states[int(i)%len(g.states)], run, episode, step)
		return nil
	}
	return attack(ctx, cfg, "recorded-choose", next, 1), nil
}
