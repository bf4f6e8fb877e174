package load

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"strconv"
	"sync/atomic"
	"time"

	vegeta "github.com/tsenart/vegeta/v12/lib"

	"github.com/qtally/qtally/client"
)

// Choose attacks the choose route with explore requests over cfg.States
// states.
func Choose(ctx context.Context, cfg Config) (Figures, error) {
	c, err := prepare(ctx, cfg)
	if err != nil {
		return Figures{}, err
	}
	g := newGenerator(cfg, "choose")
	bodies := make([][]byte, min(cfg.States, 4096))
	for i := range bodies {
		bodies[i], _ = json.Marshal(map[string]string{"state": g.states[i], "mode": "explore"})
	}
	target := c.BaseURL() + "/v1/policies/" + cfg.Policy + "/choose"
	header := jsonHeader(cfg.Token)
	var n atomic.Uint64
	next := func(t *vegeta.Target) error {
		t.Method, t.URL, t.Header = http.MethodPost, target, header
		t.Body = bodies[n.Add(1)%uint64(len(bodies))]
		return nil
	}
	return attack(ctx, cfg, "choose", next, 1), nil
}

// idPlaceholder is swapped per request for a unique prefix, so every post
// carries fresh episode ids without re-encoding the body.
const idPlaceholder = "RUNxxxxxxxxxxxxx"

// postTemplates is how many different bodies the post scenario cycles.
const postTemplates = 32

// Post attacks the episodes route with batches of fresh episodes.
func Post(ctx context.Context, cfg Config) (Figures, error) {
	c, err := prepare(ctx, cfg)
	if err != nil {
		return Figures{}, err
	}
	// Bodies cycle through postTemplates different batches, so the
	// traffic covers its states the way varied clients would.
	g := newGenerator(cfg, idPlaceholder)
	templates := make([][]byte, postTemplates)
	for i := range templates {
		templates[i] = g.batchBody(cfg.EpisodesPerPost)
	}
	target := c.BaseURL() + "/v1/policies/" + cfg.Policy + "/episodes"
	header := jsonHeader(cfg.Token)
	run := time.Now().UnixNano()
	var n atomic.Uint64
	next := func(t *vegeta.Target) error {
		i := n.Add(1)
		prefix := fmt.Sprintf("%016x", uint64(run)+i<<20)
		t.Method, t.URL, t.Header = http.MethodPost, target, header
		t.Body = bytes.ReplaceAll(templates[i%postTemplates], []byte(idPlaceholder), []byte(prefix[len(prefix)-len(idPlaceholder):]))
		return nil
	}
	return attack(ctx, cfg, "post", next, cfg.EpisodesPerPost*cfg.StepsPerEpisode), nil
}

func prepare(ctx context.Context, cfg Config) (*client.Client, error) {
	if err := checkLoopback(cfg.BaseURL); err != nil {
		return nil, err
	}
	if cfg.Duration <= 0 || cfg.Duration > 30*time.Minute {
		return nil, fmt.Errorf("load: duration must be between 0 and 30 minutes, got %v", cfg.Duration)
	}
	if cfg.Workers < 1 || cfg.States < 1 || cfg.StepsPerEpisode < 1 || cfg.EpisodesPerPost < 1 {
		return nil, fmt.Errorf("load: workers, states, steps per episode and episodes per post must be positive")
	}
	c, err := newClient(cfg)
	if err != nil {
		return nil, err
	}
	return c, ensurePolicy(ctx, c, cfg)
}

// DrainReport is how fast a worker trained a stored backlog.
type DrainReport struct {
	Episodes       int64         `json:"episodes"`
	Steps          int64         `json:"steps"`
	Pairs          int64         `json:"pairs"`
	Elapsed        time.Duration `json:"elapsed"`
	EpisodesPerSec float64       `json:"episodes_per_s"`
	StepsPerSec    float64       `json:"steps_per_s"`
}

// Drain stores episodes episodes while no worker runs (the service must run
// with --no-worker), then calls startWorker and times until the backlog is
// empty, read through obs (nil: the status route, whose counts cost the
// database more). The policy is fresh, so every pair starts unseen.
func Drain(ctx context.Context, cfg Config, episodes int, startWorker func() (stop func(), err error), obs Observer) (DrainReport, error) {
	cfg.Policy = cfg.Policy + "-drain-" + strconv.FormatInt(time.Now().Unix(), 36)
	c, err := prepare(ctx, cfg)
	if err != nil {
		return DrainReport{}, err
	}
	g := newGenerator(cfg, "drain")
	for sent := 0; sent < episodes; sent += cfg.EpisodesPerPost {
		if _, err = c.PostEpisodes(ctx, cfg.Policy, g.batch(min(cfg.EpisodesPerPost, episodes-sent))); err != nil {
			return DrainReport{}, fmt.Errorf("store backlog: %w", err)
		}
	}
	st, err := c.Policy(ctx, cfg.Policy)
	if err != nil {
		return DrainReport{}, err
	}
	if st.Backlog != int64(episodes) {
		return DrainReport{}, fmt.Errorf("backlog is %d after storing %d episodes: is a worker running? run the service with --no-worker", st.Backlog, episodes)
	}
	start := time.Now()
	stop, err := startWorker()
	if err != nil {
		return DrainReport{}, err
	}
	defer stop()
	if obs == nil {
		obs = statusObserver{c}
	}
	for backlog := st.Backlog; backlog > 0; {
		if ctx.Err() != nil {
			return DrainReport{}, ctx.Err()
		}
		time.Sleep(100 * time.Millisecond)
		if backlog, err = obs.Backlog(ctx, cfg.Policy); err != nil {
			return DrainReport{}, err
		}
	}
	elapsed := time.Since(start)
	if st, err = c.Policy(ctx, cfg.Policy); err != nil {
		return DrainReport{}, err
	}
	steps := int64(episodes * cfg.StepsPerEpisode)
	return DrainReport{Episodes: int64(episodes), Steps: steps, Pairs: st.Pairs, Elapsed: elapsed,
		EpisodesPerSec: float64(episodes) / elapsed.Seconds(), StepsPerSec: float64(steps) / elapsed.Seconds()}, nil
}
