package load

import (
	"context"
	"fmt"
	"slices"
	"strconv"
	"sync"
	"sync/atomic"
	"time"

	"github.com/qtally/qtally/client"
)

// Observer follows a policy's training. The status route can do it (see
// statusObserver), but its counts cost the database a scan of the policy's
// episodes on every call, which under a long run is load of its own; the
// load command reads the database directly when it is given its URL.
type Observer interface {
	// Backlog is the number of the policy's untrained episodes.
	Backlog(ctx context.Context, policy string) (int64, error)
	// WatchCommits calls fn with the policy's revision and the time the
	// commit became known, for every training commit, until ctx ends.
	WatchCommits(ctx context.Context, policy string, fn func(revision int64, at time.Time)) error
}

// MixedOptions shape the mixed scenario.
type MixedOptions struct {
	// ChooseEvery: the simulated clients choose at every n-th step.
	ChooseEvery int
	// Observer reads the backlog and commits; nil polls the status route.
	Observer Observer
	// Process, when set, reads the API process's memory at the start and
	// end of the run.
	Process *Process
	// Posters is how many posts of finished episodes may be under way at
	// once: a post waits for a durable commit, and clients must not wait
	// for it.
	Posters int
	// ProbeArrival also measures arrival to served: see probeArrival.
	ProbeArrival bool
	// KeepEpisodes lets qtally keep the episodes: every step's choose is
	// recorded in the episode, its reward added, and the episode ended,
	// instead of posting it finished (ChooseEvery must be 1).
	KeepEpisodes bool
	// GoClient makes the simulated clients send their chooses (and, kept,
	// rewards and ends) with Go's http.Client instead of hand-formatted
	// requests on their own connection (see httpConn): for comparison.
	GoClient bool
}

// MixedReport is what the mixed scenario saw.
type MixedReport struct {
	OfferedPerSec  float64 `json:"episodes_offered_per_s"`
	Episodes       int64   `json:"episodes_posted"`
	Chooses        int64   `json:"chooses"`
	Errors         int64   `json:"errors"`
	EpisodesPerSec float64 `json:"episodes_per_s"`
	StepsPerSec    float64 `json:"steps_per_s"`
	ChoosesPerSec  float64 `json:"chooses_per_s"`
	// Skipped counts episode starts dropped because every client was busy:
	// the offered rate was more than the clients could keep up with.
	Skipped int64 `json:"episodes_skipped"`
	// Backlog is the untrained episode count sampled once a second.
	Backlog         []int64 `json:"backlog_each_second"`
	BacklogMax      int64   `json:"backlog_max"`
	BacklogSlopePer float64 `json:"backlog_slope_per_s"`
	// Visibility is, for each training commit, the time from the commit
	// becoming known to choose answering from its revision.
	Visibility       []time.Duration `json:"commit_to_choose"`
	VisibilityP50    time.Duration   `json:"commit_to_choose_p50"`
	VisibilityP99    time.Duration   `json:"commit_to_choose_p99"`
	VisibilityMax    time.Duration   `json:"commit_to_choose_max"`
	VisibilitySource string          `json:"commit_to_choose_source"`
	// ArrivalToServed is, for each probe episode, the time from its post's
	// 202 to the first choose that knows its state (with ProbeArrival).
	ArrivalToServed []time.Duration `json:"arrival_to_served,omitempty"`
	ArrivalP50      time.Duration   `json:"arrival_to_served_p50"`
	ArrivalP99      time.Duration   `json:"arrival_to_served_p99"`
	ArrivalMax      time.Duration   `json:"arrival_to_served_max"`
	// ArrivalUnserved counts probe episodes accepted but not yet served
	// when the run ended (not in the figures above).
	ArrivalUnserved int64 `json:"arrival_unserved"`
	// MemoryStart and MemoryEnd are the API process's memory, when read.
	MemoryStart *MemoryReading `json:"memory_start,omitempty"`
	MemoryEnd   *MemoryReading `json:"memory_end,omitempty"`
	DurationSec float64        `json:"duration_s"`
}

// Mixed simulates clients that choose at every ChooseEvery-th step of their
// episodes and post each episode when it ends, batched by EpisodesPerPost,
// starting cfg.Rate episodes per second. It samples the backlog every
// second and measures how long a training commit takes to show in choose.
// A worker must be running.
func Mixed(ctx context.Context, cfg Config, opt MixedOptions) (MixedReport, error) {
	c, err := prepare(ctx, cfg)
	if err != nil {
		return MixedReport{}, err
	}
	if cfg.Rate < 1 || opt.ChooseEvery < 1 || opt.Posters < 1 {
		return MixedReport{}, fmt.Errorf("load: mixed needs a positive episode rate, choose interval and number of posters")
	}
	if opt.KeepEpisodes && opt.ChooseEvery != 1 {
		return MixedReport{}, fmt.Errorf("load: episodes qtally keeps record every step: choose every step")
	}
	target, err := newHTTPTarget(cfg)
	if err != nil {
		return MixedReport{}, err
	}
	obs, source := opt.Observer, "notifications"
	if obs == nil {
		obs, source = statusObserver{c}, "status poll (20 ms)"
	}
	rep := MixedReport{OfferedPerSec: float64(cfg.Rate), VisibilitySource: source}
	if opt.Process != nil {
		m, err := opt.Process.Read(ctx)
		if err != nil {
			return rep, err
		}
		rep.MemoryStart = &m
	}
	runCtx, cancel := context.WithTimeout(ctx, cfg.Duration)
	defer cancel()
	var chooses, episodes, errs, skipped atomic.Int64
	finished := make(chan client.Episode, 4*cfg.EpisodesPerPost)
	var wg sync.WaitGroup
	wg.Add(3)
	if opt.ProbeArrival {
		wg.Go(func() {
			rep.ArrivalToServed, rep.ArrivalUnserved = probeArrival(runCtx, c, cfg, opt.KeepEpisodes, &errs)
		})
	}
	go func() {
		defer wg.Done()
		postFinished(runCtx, c, cfg, opt.Posters, finished, &episodes, &errs)
	}()
	go func() {
		defer wg.Done()
		rep.Backlog = sampleBacklog(runCtx, obs, cfg.Policy)
	}()
	go func() {
		defer wg.Done()
		rep.Visibility = probeVisibility(runCtx, c, obs, cfg.Policy)
	}()
	start := time.Now()
	if opt.KeepEpisodes {
		keepEpisodes(runCtx, c, target, cfg, opt.GoClient, &episodes, &chooses, &errs, &skipped)
	} else {
		simulate(runCtx, c, target, cfg, opt.ChooseEvery, opt.GoClient, finished, &chooses, &errs, &skipped)
	}
	close(finished)
	wg.Wait()
	secs := time.Since(start).Seconds()
	rep.DurationSec = secs
	rep.Episodes, rep.Chooses, rep.Errors, rep.Skipped = episodes.Load(), chooses.Load(), errs.Load(), skipped.Load()
	rep.EpisodesPerSec = float64(rep.Episodes) / secs
	rep.StepsPerSec = rep.EpisodesPerSec * float64(cfg.StepsPerEpisode)
	rep.ChoosesPerSec = float64(rep.Chooses) / secs
	rep.VisibilityP50, rep.VisibilityP99 = percentile(rep.Visibility, 0.5), percentile(rep.Visibility, 0.99)
	rep.VisibilityMax = percentile(rep.Visibility, 1)
	rep.ArrivalP50, rep.ArrivalP99 = percentile(rep.ArrivalToServed, 0.5), percentile(rep.ArrivalToServed, 0.99)
	rep.ArrivalMax = percentile(rep.ArrivalToServed, 1)
	rep.BacklogSlopePer = slope(rep.Backlog)
	if len(rep.Backlog) > 0 {
		rep.BacklogMax = slices.Max(rep.Backlog)
	}
	if opt.Process != nil {
		m, err := opt.Process.Read(ctx)
		if err != nil {
			return rep, err
		}
		rep.MemoryEnd = &m
	}
	return rep, nil
}

// keepEpisodes starts episodes at cfg.Rate per second on cfg.Workers
// clients that let qtally keep them: each step's choose records it, its
// reward is added, and the episode is ended.
func keepEpisodes(ctx context.Context, c *client.Client, target httpTarget, cfg Config, goClient bool, ended, chooses, errs, skipped *atomic.Int64) {
	run := time.Now().UnixNano()
	startEpisodes(ctx, cfg, skipped, func(w int, starts <-chan struct{}) {
		g := newGenerator(Config{States: cfg.States, Actions: cfg.Actions, StepsPerEpisode: cfg.StepsPerEpisode, Seed: cfg.Seed + uint64(w)},
			fmt.Sprintf("kept-%d-%d", run, w))
		k := keeperClient(c, target, goClient)
		defer k.close()
	episodes:
		for range starts {
			ep := g.episode()
			for i, st := range ep.Steps {
				if err := k.choose(ctx, ep.ID, i, st.State); err != nil {
					if !runOver(ctx, err) {
						errs.Add(1)
					}
					continue episodes // a gap now: this episode stays open
				}
				chooses.Add(1)
				if err := k.addReward(ctx, ep.ID, i, st.Reward); err != nil && !runOver(ctx, err) {
					errs.Add(1)
				}
			}
			if err := k.end(ctx, ep.ID); err != nil {
				if !runOver(ctx, err) {
					errs.Add(1)
				}
				continue
			}
			ended.Add(1)
		}
	})
}

// episodeKeeper is what a simulated client of kept episodes sends: a
// recorded choose, a reward added with a key, an end.
type episodeKeeper interface {
	choose(ctx context.Context, episode string, step int, state string) error
	addReward(ctx context.Context, episode string, step int, reward float64) error
	end(ctx context.Context, episode string) error
	close()
}

func keeperClient(c *client.Client, target httpTarget, goClient bool) episodeKeeper {
	if goClient {
		return goKeeper{c, target.policy}
	}
	return &rawKeeper{ch: newChooser(target), policy: target.policy}
}

type goKeeper struct {
	c      *client.Client
	policy string
}

func (k goKeeper) choose(ctx context.Context, episode string, step int, state string) error {
	_, err := k.c.ChooseRecorded(ctx, k.policy, episode, step, client.ChooseRequest{State: state, Mode: client.Explore})
	return err
}

func (k goKeeper) addReward(ctx context.Context, episode string, step int, reward float64) error {
	_, err := k.c.AddReward(ctx, k.policy, episode, reward, client.RewardOptions{Key: strconv.Itoa(step)})
	return err
}

func (k goKeeper) end(ctx context.Context, episode string) error {
	_, err := k.c.EndEpisode(ctx, k.policy, episode, nil)
	return err
}

func (goKeeper) close() {}

type rawKeeper struct {
	ch     *chooser
	policy string
	body   []byte
}

func (k *rawKeeper) choose(ctx context.Context, episode string, step int, state string) error {
	_, _, err := k.ch.choose(ctx, state, episode, step)
	return err
}

// addReward adds reward to the latest decision, keyed by its step so that
// a retry adds nothing.
func (k *rawKeeper) addReward(ctx context.Context, episode string, step int, reward float64) error {
	k.body = append(k.body[:0], `{"reward":`...)
	k.body = strconv.AppendFloat(k.body, reward, 'g', -1, 64)
	k.body = append(k.body, `,"key":"`...)
	k.body = strconv.AppendInt(k.body, int64(step), 10)
	k.body = append(k.body, `"}`...)
	return k.send(ctx, policyPath(k.policy, "open-episodes", episode, "rewards"), k.body, `"step":`)
}

func (k *rawKeeper) end(ctx context.Context, episode string) error {
	return k.send(ctx, policyPath(k.policy, "open-episodes", episode, "end"), []byte(`{}`), `"steps":`)
}

// send posts body and wants 200 with an answer holding field.
func (k *rawKeeper) send(ctx context.Context, path string, body []byte, field string) error {
	status, answer, err := k.ch.conn.post(ctx, path, body)
	switch {
	case err != nil:
		return fmt.Errorf("%s: %w", path, err)
	case status != 200:
		return fmt.Errorf("%s: %d %s", path, status, excerpt(answer))
	}
	if _, ok := jsonField(answer, field); !ok {
		return fmt.Errorf("%s: no %s in %s", path, field, excerpt(answer))
	}
	return nil
}

func (k *rawKeeper) close() { k.ch.conn.close() }

// startEpisodes runs cfg.Workers clients and hands them episode starts at
// cfg.Rate per second until ctx ends. Starts are counted against the
// clock, so a late tick catches up instead of lowering the rate.
func startEpisodes(ctx context.Context, cfg Config, skipped *atomic.Int64, play func(w int, starts <-chan struct{})) {
	starts := make(chan struct{}, cfg.Workers)
	var wg sync.WaitGroup
	for w := range cfg.Workers {
		wg.Go(func() { play(w, starts) })
	}
	tick := time.NewTicker(5 * time.Millisecond)
	defer tick.Stop()
	begin, started := time.Now(), int64(0)
loop:
	for {
		select {
		case <-ctx.Done():
			break loop
		case now := <-tick.C:
			due := int64(now.Sub(begin).Seconds() * float64(cfg.Rate))
			for ; started < due; started++ {
				select {
				case starts <- struct{}{}:
				default: // every client busy: the offered rate is above what they manage
					skipped.Add(1)
				}
			}
		}
	}
	close(starts)
	wg.Wait()
}

// simulate starts episodes at cfg.Rate per second on cfg.Workers clients,
// which choose at every chooseEvery-th step and hand each finished episode
// to be posted.
func simulate(ctx context.Context, c *client.Client, target httpTarget, cfg Config, chooseEvery int, goClient bool, finished chan<- client.Episode, chooses, errs, skipped *atomic.Int64) {
	run := time.Now().UnixNano()
	startEpisodes(ctx, cfg, skipped, func(w int, starts <-chan struct{}) {
		g := newGenerator(Config{States: cfg.States, Actions: cfg.Actions, StepsPerEpisode: cfg.StepsPerEpisode, Seed: cfg.Seed + uint64(w)},
			fmt.Sprintf("mixed-%d-%d", run, w))
		choose := func(state string) (string, float64, error) {
			r, err := c.Choose(ctx, cfg.Policy, client.ChooseRequest{State: state, Mode: client.Explore})
			return r.Action, r.Probability, err
		}
		if !goClient {
			ch := newChooser(target)
			defer ch.conn.close()
			choose = func(state string) (string, float64, error) { return ch.choose(ctx, state, "", 0) }
		}
		for range starts {
			ep := g.episode()
			for i := range ep.Steps {
				if i%chooseEvery != 0 {
					continue
				}
				action, probability, err := choose(ep.Steps[i].State)
				if err != nil {
					if runOver(ctx, err) {
						return // the run is over: this episode is not posted
					}
					errs.Add(1)
					continue
				}
				chooses.Add(1)
				ep.Steps[i].Action, ep.Steps[i].Probability = action, probability
			}
			select {
			case finished <- ep:
			case <-ctx.Done():
				return
			}
		}
	})
}

// postFinished batches finished episodes by cfg.EpisodesPerPost (or what
// finished in 200 ms) and posts the batches from up to posters clients.
func postFinished(ctx context.Context, c *client.Client, cfg Config, posters int, finished <-chan client.Episode, posted, errs *atomic.Int64) {
	batches := make(chan []client.Episode, posters)
	var wg sync.WaitGroup
	for range posters {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for batch := range batches {
				// Episodes finished before the end are posted even after it.
				if _, err := c.PostEpisodes(context.WithoutCancel(ctx), cfg.Policy, batch); err != nil {
					errs.Add(1)
				} else {
					posted.Add(int64(len(batch)))
				}
			}
		}()
	}
	defer wg.Wait()
	defer close(batches)
	batch := make([]client.Episode, 0, cfg.EpisodesPerPost)
	flush := func() {
		if len(batch) > 0 {
			batches <- batch
			batch = make([]client.Episode, 0, cfg.EpisodesPerPost)
		}
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

func sampleBacklog(ctx context.Context, obs Observer, policy string) []int64 {
	var out []int64
	tick := time.NewTicker(time.Second)
	defer tick.Stop()
	for {
		select {
		case <-ctx.Done():
			return out
		case <-tick.C:
			if n, err := obs.Backlog(ctx, policy); err == nil {
				out = append(out, n)
			}
		}
	}
}

type commit struct {
	revision int64
	at       time.Time
}

// probeVisibility measures, for each training commit the observer
// reports, how long until choose answers from that revision or a later one.
// While it waits, later commits queue; one already visible when its turn
// comes counts from its own commit, so every figure is an upper bound.
func probeVisibility(ctx context.Context, c *client.Client, obs Observer, policy string) []time.Duration {
	commits := make(chan commit, 1024)
	go func() {
		_ = obs.WatchCommits(ctx, policy, func(revision int64, at time.Time) {
			select {
			case commits <- commit{revision, at}:
			default: // the probe is far behind; later commits still come
			}
		})
	}()
	var out []time.Duration
	for {
		var cm commit
		select {
		case <-ctx.Done():
			return out
		case cm = <-commits:
		}
		for ctx.Err() == nil {
			if r, err := c.Choose(ctx, policy, client.ChooseRequest{State: "visibility-probe", Mode: client.Explore}); err == nil && r.Revision >= cm.revision {
				out = append(out, time.Since(cm.at))
				break
			}
			time.Sleep(time.Millisecond)
		}
	}
}

// arrivalProbePause is the time between one probe episode being served and
// the next being posted.
const arrivalProbePause = 100 * time.Millisecond

// probeArrival posts, one after another, single episodes of a state no
// other traffic uses, each as its own request beside the load, and for
// each measures the time from the post's 202 to the first choose (polled
// every 5 ms) that knows the state: the episode waited behind whatever
// backlog there was, was trained, and reached the API's copy. With keep,
// each probe is an episode qtally keeps (one recorded decision, its reward,
// the end), timed from the end's answer.
func probeArrival(ctx context.Context, c *client.Client, cfg Config, keep bool, errs *atomic.Int64) (served []time.Duration, unserved int64) {
	run := time.Now().UnixNano()
	for n := 0; ctx.Err() == nil; n++ {
		state := fmt.Sprintf("arrival-probe-%d-%d", run, n)
		if err := arrive(ctx, c, cfg.Policy, state, cfg.Actions[0], keep); err != nil {
			if ctx.Err() == nil {
				errs.Add(1)
			}
			continue
		}
		accepted := time.Now()
		unserved++
		for ctx.Err() == nil {
			// Explore: greedy has no answer in a state not trained yet.
			if r, err := c.Choose(ctx, cfg.Policy, client.ChooseRequest{State: state, Mode: client.Explore}); err == nil && r.KnownState {
				served = append(served, time.Since(accepted))
				unserved--
				break
			}
			time.Sleep(5 * time.Millisecond)
		}
		select {
		case <-ctx.Done():
		case <-time.After(arrivalProbePause):
		}
	}
	return served, unserved
}

// arrive hands qtally a one-step episode in state, finished: posted, or
// (keep) recorded, rewarded and ended in qtally.
func arrive(ctx context.Context, c *client.Client, policy, state, action string, keep bool) error {
	if !keep {
		ep := client.Episode{ID: state, Steps: []client.Step{{State: state, Action: action, Reward: 1, Probability: 1}}}
		_, err := c.PostEpisodes(ctx, policy, []client.Episode{ep})
		return err
	}
	if _, err := c.ChooseRecorded(ctx, policy, state, 0, client.ChooseRequest{State: state, Mode: client.Explore}); err != nil {
		return err
	}
	if _, err := c.AddReward(ctx, policy, state, 1, client.RewardOptions{Key: "0"}); err != nil {
		return err
	}
	_, err := c.EndEpisode(ctx, policy, state, nil)
	return err
}

// statusObserver follows training through the status route: no database
// access needed, but each call counts the policy's episodes, and commits
// are seen only at the next 20 ms poll (not counted in the figure).
type statusObserver struct{ c *client.Client }

func (o statusObserver) Backlog(ctx context.Context, policy string) (int64, error) {
	st, err := o.c.Policy(ctx, policy)
	return st.Backlog, err
}

func (o statusObserver) WatchCommits(ctx context.Context, policy string, fn func(int64, time.Time)) error {
	seen := int64(-1)
	for ctx.Err() == nil {
		if st, err := o.c.Policy(ctx, policy); err == nil && st.Revision > seen {
			if seen >= 0 {
				fn(st.Revision, time.Now())
			}
			seen = st.Revision
		}
		time.Sleep(20 * time.Millisecond)
	}
	return nil
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
