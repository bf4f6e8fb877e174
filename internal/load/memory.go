package load

import (
	"context"
	"fmt"
	"strconv"
	"sync"
	"time"

	"github.com/qtally/qtally/client"
)

// MemoryReport is what the in-memory copy of one policy costs the API
// process.
type MemoryReport struct {
	Policy string `json:"policy"`
	Pairs  int64  `json:"pairs"`
	// Before is read once the policy's episodes are trained and before
	// any choose on it; After once one choose has loaded it.
	Before MemoryReading `json:"before"`
	After  MemoryReading `json:"after"`
	// HeapAddedBytes and RSSAddedBytes are After minus Before.
	HeapAddedBytes int64         `json:"heap_added_bytes"`
	RSSAddedBytes  int64         `json:"rss_added_bytes"`
	HeapPerPair    float64       `json:"heap_bytes_per_pair"`
	LoadTime       time.Duration `json:"load_time"`
	FillTime       time.Duration `json:"fill_time"`
}

// Memory fills a fresh policy with pairs distinct pairs (episodes that
// visit each pair exactly once, cfg.StepsPerEpisode pairs per episode),
// waits until a worker has trained them all, then measures how much the API
// process grows when its first choose loads the policy into memory.
func Memory(ctx context.Context, cfg Config, pairs int, proc *Process) (MemoryReport, error) {
	if pairs < 1 {
		return MemoryReport{}, fmt.Errorf("load: memory needs a positive number of pairs")
	}
	cfg.Policy = cfg.Policy + "-memory-" + strconv.FormatInt(time.Now().Unix(), 36)
	cfg.States = (pairs + len(cfg.Actions) - 1) / len(cfg.Actions)
	c, err := prepare(ctx, cfg)
	if err != nil {
		return MemoryReport{}, err
	}
	rep := MemoryReport{Policy: cfg.Policy}
	start := time.Now()
	if err = fillPairs(ctx, c, cfg, pairs); err != nil {
		return rep, err
	}
	st, err := waitTrained(ctx, c, cfg.Policy, 30*time.Minute)
	if err != nil {
		return rep, err
	}
	rep.Pairs, rep.FillTime = st.Pairs, time.Since(start)
	if rep.Before, err = proc.Read(ctx); err != nil {
		return rep, err
	}
	start = time.Now()
	r, err := c.Choose(ctx, cfg.Policy, client.ChooseRequest{State: stateName(0), Mode: client.Greedy})
	if err != nil {
		return rep, err
	}
	rep.LoadTime = time.Since(start)
	if !r.KnownState {
		return rep, fmt.Errorf("the first state is unknown after training: the policy was not loaded")
	}
	if rep.After, err = proc.Read(ctx); err != nil {
		return rep, err
	}
	rep.HeapAddedBytes = int64(rep.After.HeapBytes) - int64(rep.Before.HeapBytes)
	rep.RSSAddedBytes = int64(rep.After.RSSBytes) - int64(rep.Before.RSSBytes)
	rep.HeapPerPair = float64(rep.HeapAddedBytes) / float64(max(rep.Pairs, 1))
	return rep, nil
}

// fillPairs posts episodes that together visit pair i = (state i/|A|,
// action i mod |A|) once for every i < pairs, from four clients.
func fillPairs(ctx context.Context, c *client.Client, cfg Config, pairs int) error {
	perPost := cfg.EpisodesPerPost * cfg.StepsPerEpisode
	posts := make(chan int)
	errs := make(chan error, 4)
	var wg sync.WaitGroup
	for range 4 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for first := range posts {
				if _, err := c.PostEpisodes(ctx, cfg.Policy, coveringBatch(cfg, first, min(first+perPost, pairs))); err != nil {
					errs <- err
					return
				}
			}
		}()
	}
	var err error
send:
	for first := 0; first < pairs; first += perPost {
		select {
		case posts <- first:
		case err = <-errs:
			break send
		case <-ctx.Done():
			err = ctx.Err()
			break send
		}
	}
	close(posts)
	wg.Wait()
	if err == nil && len(errs) > 0 {
		err = <-errs
	}
	return err
}

// coveringBatch is a batch of episodes visiting pairs [first, end) in order.
func coveringBatch(cfg Config, first, end int) []client.Episode {
	var eps []client.Episode
	for i := first; i < end; i += cfg.StepsPerEpisode {
		ep := client.Episode{ID: "cover-" + strconv.Itoa(i)}
		for j := i; j < min(i+cfg.StepsPerEpisode, end); j++ {
			ep.Steps = append(ep.Steps, client.Step{State: stateName(j / len(cfg.Actions)),
				Action: cfg.Actions[j%len(cfg.Actions)], Reward: float64(j%13) / 4, Probability: 0.25})
		}
		eps = append(eps, ep)
	}
	return eps
}

// waitTrained polls the policy's status until nothing is left to train.
func waitTrained(ctx context.Context, c *client.Client, policy string, within time.Duration) (client.PolicyStatus, error) {
	deadline := time.Now().Add(within)
	for {
		st, err := c.Policy(ctx, policy)
		if err != nil || st.Backlog == 0 {
			return st, err
		}
		if time.Now().After(deadline) {
			return st, fmt.Errorf("%d episodes of policy %s still untrained after %v: is a worker running?", st.Backlog, policy, within)
		}
		select {
		case <-ctx.Done():
			return st, ctx.Err()
		case <-time.After(250 * time.Millisecond):
		}
	}
}

// WaitReport says how long a policy's backlog took to be trained.
type WaitReport struct {
	Policy  string        `json:"policy"`
	Elapsed time.Duration `json:"elapsed"`
	Pairs   int64         `json:"pairs"`
}

// Wait returns once the policy has no untrained episodes.
func Wait(ctx context.Context, cfg Config, within time.Duration) (WaitReport, error) {
	if err := checkLoopback(cfg.BaseURL); err != nil {
		return WaitReport{}, err
	}
	c, err := newClient(cfg)
	if err != nil {
		return WaitReport{}, err
	}
	start := time.Now()
	st, err := waitTrained(ctx, c, cfg.Policy, within)
	return WaitReport{Policy: cfg.Policy, Elapsed: time.Since(start), Pairs: st.Pairs}, err
}
