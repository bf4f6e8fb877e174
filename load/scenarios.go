package load

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"slices"
	"strconv"
	"sync"
	"sync/atomic"
	"time"

	vegeta "github.com/tsenart/vegeta/v12/lib"
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
	target := c.base + "/v1/policies/" + cfg.Policy + "/choose"
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

// Post attacks the episodes route with batches of fresh episodes.
func Post(ctx context.Context, cfg Config) (Figures, error) {
	c, err := prepare(ctx, cfg)
	if err != nil {
		return Figures{}, err
	}
	template := newGenerator(cfg, idPlaceholder).batchBody(cfg.EpisodesPerPost)
	target := c.base + "/v1/policies/" + cfg.Policy + "/episodes"
	header := jsonHeader(cfg.Token)
	run := time.Now().UnixNano()
	var n atomic.Uint64
	next := func(t *vegeta.Target) error {
		prefix := fmt.Sprintf("%016x", uint64(run)+n.Add(1)<<20)
		t.Method, t.URL, t.Header = http.MethodPost, target, header
		t.Body = bytes.ReplaceAll(template, []byte(idPlaceholder), []byte(prefix[len(prefix)-len(idPlaceholder):]))
		return nil
	}
	return attack(ctx, cfg, "post", next, cfg.EpisodesPerPost*cfg.StepsPerEpisode), nil
}

func prepare(ctx context.Context, cfg Config) (*client, error) {
	if err := checkLoopback(cfg.BaseURL); err != nil {
		return nil, err
	}
	if cfg.Duration <= 0 || cfg.Duration > 30*time.Minute {
		return nil, fmt.Errorf("load: duration must be between 0 and 30 minutes, got %v", cfg.Duration)
	}
	if cfg.Workers < 1 || cfg.States < 1 || cfg.StepsPerEpisode < 1 || cfg.EpisodesPerPost < 1 {
		return nil, fmt.Errorf("load: workers, states, steps per episode and episodes per post must be positive")
	}
	c := newClient(cfg)
	return c, c.ensurePolicy(ctx, cfg)
}

// MixedReport is what the mixed scenario saw.
type MixedReport struct {
	Episodes        int64           `json:"episodes_posted"`
	Chooses         int64           `json:"chooses"`
	Errors          int64           `json:"errors"`
	EpisodesPerSec  float64         `json:"episodes_per_s"`
	StepsPerSec     float64         `json:"steps_per_s"`
	ChoosesPerSec   float64         `json:"chooses_per_s"`
	Backlog         []int64         `json:"backlog_each_second"`
	Visibility      []time.Duration `json:"commit_to_choose"`
	VisibilityP50   time.Duration   `json:"commit_to_choose_p50"`
	VisibilityP99   time.Duration   `json:"commit_to_choose_p99"`
	BacklogSlopePer float64         `json:"backlog_slope_per_s"`
}

// Mixed simulates clients that choose at every chooseEvery-th step of
// their episodes and post each episode when it ends, at cfg.Rate episodes
// per second. It samples the backlog every second and measures how long a
// training commit takes to show in choose.
func Mixed(ctx context.Context, cfg Config, chooseEvery int) (MixedReport, error) {
	c, err := prepare(ctx, cfg)
	if err != nil {
		return MixedReport{}, err
	}
	if cfg.Rate < 1 || chooseEvery < 1 {
		return MixedReport{}, fmt.Errorf("load: mixed needs a positive episode rate and choose interval")
	}
	ctx, cancel := context.WithTimeout(ctx, cfg.Duration)
	defer cancel()
	var rep MixedReport
	var chooses, episodes, errs atomic.Int64
	finished := make(chan episode, 4*cfg.EpisodesPerPost)
	var wg sync.WaitGroup
	wg.Add(3)
	go func() { // posters: batch finished episodes
		defer wg.Done()
		postFinished(ctx, c, cfg, finished, &episodes, &errs)
	}()
	go func() { // backlog, once a second
		defer wg.Done()
		rep.Backlog = sampleBacklog(ctx, c, cfg.Policy)
	}()
	go func() {
		defer wg.Done()
		rep.Visibility = probeVisibility(ctx, c, cfg.Policy)
	}()
	start := time.Now()
	simulate(ctx, c, cfg, chooseEvery, finished, &chooses, &errs)
	close(finished)
	wg.Wait()
	secs := time.Since(start).Seconds()
	rep.Episodes, rep.Chooses, rep.Errors = episodes.Load(), chooses.Load(), errs.Load()
	rep.EpisodesPerSec = float64(rep.Episodes) / secs
	rep.StepsPerSec = rep.EpisodesPerSec * float64(cfg.StepsPerEpisode)
	rep.ChoosesPerSec = float64(rep.Chooses) / secs
	rep.VisibilityP50, rep.VisibilityP99 = percentile(rep.Visibility, 0.5), percentile(rep.Visibility, 0.99)
	rep.BacklogSlopePer = slope(rep.Backlog)
	return rep, nil
}

// simulate starts episodes at cfg.Rate per second on cfg.Workers clients.
func simulate(ctx context.Context, c *client, cfg Config, chooseEvery int, finished chan<- episode, chooses, errs *atomic.Int64) {
	starts := make(chan int)
	var wg sync.WaitGroup
	for w := range cfg.Workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			g := newGenerator(Config{States: cfg.States, Actions: cfg.Actions, StepsPerEpisode: cfg.StepsPerEpisode, Seed: cfg.Seed + uint64(w)}, fmt.Sprintf("mixed-%d-%d", time.Now().UnixNano(), w))
			for range starts {
				ep := g.episode()
				for i := range ep.Steps {
					if i%chooseEvery != 0 {
						continue
					}
					var r struct {
						Action      string  `json:"action"`
						Probability float64 `json:"probability"`
					}
					if _, err := c.do(ctx, http.MethodPost, "/v1/policies/"+cfg.Policy+"/choose",
						map[string]string{"state": ep.Steps[i].State, "mode": "explore"}, &r); err != nil {
						errs.Add(1)
						continue
					}
					chooses.Add(1)
					ep.Steps[i].Action, ep.Steps[i].Probability = r.Action, r.Probability
				}
				select {
				case finished <- ep:
				case <-ctx.Done():
					return
				}
			}
		}()
	}
	tick := time.NewTicker(time.Second / time.Duration(cfg.Rate))
	defer tick.Stop()
loop:
	for {
		select {
		case <-ctx.Done():
			break loop
		case <-tick.C:
			select {
			case starts <- 0:
			default: // every client busy: the offered rate is above what they manage
			}
		}
	}
	close(starts)
	wg.Wait()
}

func postFinished(ctx context.Context, c *client, cfg Config, finished <-chan episode, posted, errs *atomic.Int64) {
	batch := make([]episode, 0, cfg.EpisodesPerPost)
	flush := func() {
		if len(batch) == 0 {
			return
		}
		if _, err := c.do(context.WithoutCancel(ctx), http.MethodPost, "/v1/policies/"+cfg.Policy+"/episodes",
			map[string]any{"episodes": batch}, nil); err != nil {
			errs.Add(1)
		} else {
			posted.Add(int64(len(batch)))
		}
		batch = batch[:0]
	}
	tick := time.NewTicker(200 * time.Millisecond)
	defer tick.Stop()
	for {
		select {
		case ep, ok := <-finished:
			if !ok {
				flush()
				return
			}
			batch = append(batch, ep)
			if len(batch) == cfg.EpisodesPerPost {
				flush()
			}
		case <-tick.C:
			flush()
		}
	}
}

func sampleBacklog(ctx context.Context, c *client, policy string) []int64 {
	var out []int64
	tick := time.NewTicker(time.Second)
	defer tick.Stop()
	for {
		select {
		case <-ctx.Done():
			return out
		case <-tick.C:
			if st, err := c.status(ctx, policy); err == nil {
				out = append(out, st.Backlog)
			}
		}
	}
}

// probeVisibility watches for new training revisions in the policy's
// status and measures how long until choose answers from them. The status
// is read right after commit, so this bounds commit-to-choose from above
// by the status poll interval (20 ms).
func probeVisibility(ctx context.Context, c *client, policy string) []time.Duration {
	var out []time.Duration
	seen := int64(-1)
	for ctx.Err() == nil {
		st, err := c.status(ctx, policy)
		if err != nil || st.Revision <= seen {
			time.Sleep(20 * time.Millisecond)
			continue
		}
		seen = st.Revision
		appeared := time.Now()
		for ctx.Err() == nil {
			var r struct {
				Revision int64 `json:"revision"`
			}
			if _, err := c.do(ctx, http.MethodPost, "/v1/policies/"+policy+"/choose",
				map[string]string{"state": "visibility-probe", "mode": "greedy"}, &r); err == nil && r.Revision >= seen {
				out = append(out, time.Since(appeared))
				break
			}
			time.Sleep(2 * time.Millisecond)
		}
	}
	return out
}

func percentile(ds []time.Duration, q float64) time.Duration {
	if len(ds) == 0 {
		return 0
	}
	s := slices.Clone(ds)
	slices.Sort(s)
	return s[min(len(s)-1, int(q*float64(len(s))))]
}

// slope is the least-squares trend of a series sampled once a second: a
// bounded backlog has a slope near zero.
func slope(ys []int64) float64 {
	n := float64(len(ys))
	if n < 2 {
		return 0
	}
	var sx, sy, sxx, sxy float64
	for i, y := range ys {
		x := float64(i)
		sx, sy, sxx, sxy = sx+x, sy+float64(y), sxx+x*x, sxy+x*float64(y)
	}
	return (n*sxy - sx*sy) / (n*sxx - sx*sx)
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
// empty. The policy is fresh, so every pair starts unseen.
func Drain(ctx context.Context, cfg Config, episodes int, startWorker func() (stop func(), err error)) (DrainReport, error) {
	cfg.Policy = cfg.Policy + "-drain-" + strconv.FormatInt(time.Now().Unix(), 36)
	c, err := prepare(ctx, cfg)
	if err != nil {
		return DrainReport{}, err
	}
	g := newGenerator(cfg, "drain")
	for sent := 0; sent < episodes; sent += cfg.EpisodesPerPost {
		n := min(cfg.EpisodesPerPost, episodes-sent)
		req, _ := http.NewRequestWithContext(ctx, http.MethodPost, c.base+"/v1/policies/"+cfg.Policy+"/episodes", bytes.NewReader(g.batchBody(n)))
		req.Header = jsonHeader(cfg.Token)
		resp, err := c.http.Do(req)
		if err != nil {
			return DrainReport{}, fmt.Errorf("store backlog: %w", err)
		}
		resp.Body.Close()
		if resp.StatusCode != http.StatusAccepted {
			return DrainReport{}, fmt.Errorf("store backlog: status %d", resp.StatusCode)
		}
	}
	st, err := c.status(ctx, cfg.Policy)
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
	for st.Backlog > 0 {
		if ctx.Err() != nil {
			return DrainReport{}, ctx.Err()
		}
		// The status reads counts; a gentle poll keeps it off the drain's path.
		time.Sleep(100 * time.Millisecond)
		if st, err = c.status(ctx, cfg.Policy); err != nil {
			return DrainReport{}, err
		}
	}
	elapsed := time.Since(start)
	steps := int64(episodes * cfg.StepsPerEpisode)
	return DrainReport{Episodes: int64(episodes), Steps: steps, Pairs: st.Pairs, Elapsed: elapsed,
		EpisodesPerSec: float64(episodes) / elapsed.Seconds(), StepsPerSec: float64(steps) / elapsed.Seconds()}, nil
}
