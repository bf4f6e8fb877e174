package demo

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"net/http"
	"net/url"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"golang.org/x/sync/errgroup"

	"github.com/qtally/qtally/client"
)

// PolicySettings are the learning settings the demo registers for its
// policy (the body of PUT /v1/policies/{policy} without the actions).
type PolicySettings struct {
	Gamma              float64 `json:"gamma"`
	Alpha              float64 `json:"alpha"`
	Epsilon            float64 `json:"epsilon"`
	EpsilonMin         float64 `json:"epsilon_min"`
	EpsilonDecayVisits float64 `json:"epsilon_decay_visits"`
	Visit              string  `json:"visit"`
	InitialQ           float64 `json:"initial_q"`
}

// RecommendedSettings learn this scenario to at least 90% of the way from
// the random policy's value to the optimum within about 30,000 episodes.
// They were tuned by simulating the service's learning rule (first-visit
// constant-step Monte Carlo, epsilon-soft with per-state decay) on this
// model over many seeds.
func RecommendedSettings() PolicySettings {
	return PolicySettings{
		// Episodes last at most DayCap days, so discounting barely matters;
		// the report's exact values use the same gamma.
		Gamma: 0.99,
		// Small: returns vary by the whole price of a plan, and the
		// estimate's noise grows with alpha.
		Alpha: 0.02,
		// Fully random in a new state, greedy in a familiar one.
		Epsilon:            1,
		EpsilonMin:         0.02,
		EpsilonDecayVisits: 300,
		Visit:              "first",
		InitialQ:           0,
	}
}

// epsilonFor is the exploration rate the service gives a state visited
// visits times in all: max(epsilon_min, epsilon k / (k + visits)) with k
// the decay setting, or epsilon when there is no decay.
func (s PolicySettings) epsilonFor(visits int64) float64 {
	if s.EpsilonDecayVisits <= 0 {
		return s.Epsilon
	}
	k := s.EpsilonDecayVisits
	return math.Max(s.EpsilonMin, s.Epsilon*k/(k+float64(visits)))
}

// Config says where to send simulated customers and how many.
type Config struct {
	// BaseURL is the service root, such as http://127.0.0.1:8080; the
	// client sends requests there and nowhere else.
	BaseURL string
	Policy  string
	// Token, when set, is sent as "Authorization: Bearer <Token>".
	Token string
	// Rate is episodes started per second; 0 starts them as fast as the
	// workers finish them.
	Rate float64
	// The run stops starting episodes when Duration has passed or Episodes
	// have started, whichever comes first; 0 turns either limit off, but not
	// both.
	Duration time.Duration
	Episodes int
	// BatchSize is episodes per POST.
	BatchSize int
	// Concurrency is customers in flight at once.
	Concurrency int
	// Seed makes the customers' side of every episode reproducible; the
	// service's choices are its own.
	Seed uint64
	// Window is how many recent episodes the running mean return covers.
	Window int
	// ProgressInterval is the time between progress lines.
	ProgressInterval time.Duration
	// SettleTimeout bounds the wait, after the last post, for the worker to
	// train every stored episode before the learned policy is read.
	SettleTimeout time.Duration
	Settings      PolicySettings
	// KeepEpisodes lets qtally keep each customer's episode open: every
	// choose records its decision there, rewards are added as they happen,
	// and the episode is ended when the customer's case closes, instead of
	// the client keeping trajectories and posting them finished.
	KeepEpisodes bool
}

// DefaultConfig is a one-minute run against a local service.
func DefaultConfig() Config {
	return Config{
		BaseURL:          "http://127.0.0.1:8080",
		Policy:           "payment-recovery-demo",
		Rate:             500,
		Episodes:         30_000,
		BatchSize:        100,
		Concurrency:      16,
		Seed:             1,
		Window:           1000,
		ProgressInterval: time.Second,
		SettleTimeout:    30 * time.Second,
		Settings:         RecommendedSettings(),
	}
}

func (c Config) validate() error {
	u, err := url.Parse(c.BaseURL)
	switch {
	case err != nil:
		return fmt.Errorf("base URL: %w", err)
	case u.Scheme != "http" && u.Scheme != "https" || u.Host == "":
		return fmt.Errorf("base URL %q: want http://host:port or https://host:port", c.BaseURL)
	case c.Policy == "":
		return errors.New("policy name is empty")
	case c.Rate < 0 || math.IsNaN(c.Rate) || math.IsInf(c.Rate, 0):
		return fmt.Errorf("rate %v: want a finite number of episodes per second, 0 for unpaced", c.Rate)
	case c.Duration < 0 || c.Episodes < 0:
		return errors.New("duration and episode budget cannot be negative")
	case c.Duration == 0 && c.Episodes == 0:
		return errors.New("set a duration, an episode budget or both")
	case c.BatchSize < 1 || c.Concurrency < 1 || c.Window < 1:
		return errors.New("batch size, concurrency and window must be at least 1")
	case c.ProgressInterval <= 0 || c.SettleTimeout <= 0:
		return errors.New("progress interval and settle timeout must be positive")
	}
	return nil
}

// Report is what a run achieved. Returns are discounted with the policy's
// gamma, in the scenario's currency units per failed renewal.
type Report struct {
	Episodes   int // episodes this run posted, accepted or duplicate
	Duplicates int
	Elapsed    time.Duration
	// MeanReturn is the mean return of the last Window episodes, as
	// experienced while exploring.
	MeanReturn float64
	Window     int
	// PriorEpisodes were stored for the policy before this run.
	PriorEpisodes int64
	// Untrained counts stored episodes the worker had not trained when Q
	// was read (0 unless the settle timeout ran out).
	Untrained int64
	// Exact expected returns from the start distribution.
	Optimal float64
	Learned float64 // greedy policy on the service's Q, ties split evenly
	// Exploring is what explore mode now runs: epsilon-soft on the
	// service's Q with each state's decayed epsilon.
	Exploring float64
	// BestFixed is the value of always taking BestFixedAction, the best
	// single action: what a rule needing no learning gets.
	BestFixed       float64
	BestFixedAction Action
	Random          float64 // every action equally likely
	// FirstDay compares the learned and optimal first actions per customer kind.
	FirstDay []FirstAction
}

// FirstAction is the day-0 decision for one start state.
type FirstAction struct {
	State   State
	Learned []Action
	Optimal []Action
	// Shortfall is how much less the learned choice is worth than the
	// optimal one when the optimal policy takes over from day 1; near 0
	// means a near tie, not a mistake.
	Shortfall float64
}

// Fraction is how far the learned policy got from random to optimal: 0 is
// no better than random, 1 is optimal.
func (r Report) Fraction() float64 {
	return (r.Learned - r.Random) / (r.Optimal - r.Random)
}

// FractionFromBestFixed is how far the learned policy got from the best
// single fixed action to optimal: 0 is no better than always taking that
// action, 1 is optimal. Random is a low bar; this one says what learning
// added to the plainest rule.
func (r Report) FractionFromBestFixed() float64 {
	return (r.Learned - r.BestFixed) / (r.Optimal - r.BestFixed)
}

func (r Report) String() string {
	var b strings.Builder
	fmt.Fprintf(&b, "episodes sent:             %d (%d duplicates) in %s\n", r.Episodes, r.Duplicates, r.Elapsed.Round(time.Second))
	if r.PriorEpisodes > 0 {
		fmt.Fprintf(&b, "episodes stored before:    %d (the policy kept learning from them)\n", r.PriorEpisodes)
	}
	if r.Untrained > 0 {
		fmt.Fprintf(&b, "not yet trained:           %d episodes when Q was read\n", r.Untrained)
	}
	fmt.Fprintf(&b, "mean return, last %-6d   %.3f (while exploring)\n", r.Window, r.MeanReturn)
	fmt.Fprintf(&b, "optimal expected return:   %.3f\n", r.Optimal)
	fmt.Fprintf(&b, "learned greedy policy:     %.3f\n", r.Learned)
	fmt.Fprintf(&b, "exploring behaviour:       %.3f (explore mode on the learned Q, as it stands)\n", r.Exploring)
	fmt.Fprintf(&b, "best fixed action:         %.3f (always %s)\n", r.BestFixed, r.BestFixedAction)
	fmt.Fprintf(&b, "random policy:             %.3f\n", r.Random)
	fmt.Fprintf(&b, "random -> optimal:         %.1f%% of the way\n", 100*r.Fraction())
	fmt.Fprintf(&b, "best fixed -> optimal:     %.1f%% of the way\n", 100*r.FractionFromBestFixed())
	b.WriteString("day-0 action by customer (learned / optimal):\n")
	for _, f := range r.FirstDay {
		fmt.Fprintf(&b, "  %-18s %-7s  %s / %s", f.State.Reason, f.State.Plan, joinActions(f.Learned), joinActions(f.Optimal))
		if f.Shortfall > 0 {
			fmt.Fprintf(&b, "  (%.3f less)", f.Shortfall)
		}
		b.WriteString("\n")
	}
	return b.String()
}

func joinActions(actions []Action) string {
	names := make([]string, len(actions))
	for i, a := range actions {
		names[i] = a.String()
	}
	return strings.Join(names, " or ")
}

// Run registers the demo policy, plays simulated customers against the
// service until the duration or episode budget is used up, waits for the
// worker to train what was sent, and reports how good the learned policy
// is against the exact optimum.
func Run(ctx context.Context, cfg Config, out io.Writer) (Report, error) {
	if err := cfg.validate(); err != nil {
		return Report{}, fmt.Errorf("demo config: %w", err)
	}
	c, err := newDriver(cfg)
	if err != nil {
		return Report{}, err
	}
	if err = c.putPolicy(ctx); err != nil {
		return Report{}, err
	}
	before, err := c.policyStatus(ctx)
	if err != nil {
		return Report{}, err
	}
	optimal := Optimal(cfg.Settings.Gamma)
	report := Report{
		PriorEpisodes: before.Episodes,
		Optimal:       optimal.Start(),
		Random:        RandomValue(cfg.Settings.Gamma),
	}
	report.BestFixedAction, report.BestFixed = BestFixedAction(cfg.Settings.Gamma)
	fmt.Fprintf(out, "demo: policy %q at %s; optimal expected return %.3f, random %.3f\n",
		cfg.Policy, cfg.BaseURL, report.Optimal, report.Random)

	start := time.Now()
	traffic, err := c.sendTraffic(ctx, out)
	if err != nil {
		return Report{}, err
	}
	report.Episodes, report.Duplicates = traffic.sent, traffic.duplicates
	report.MeanReturn, report.Window = traffic.window.mean(), traffic.window.len()
	report.Elapsed = time.Since(start)

	fmt.Fprintf(out, "demo: waiting for the worker to train what was sent\n")
	if report.Untrained, err = c.settle(ctx); err != nil {
		return Report{}, err
	}
	q, visits, err := c.readQ(ctx)
	if err != nil {
		return Report{}, err
	}
	report.Learned = Evaluate(Greedy(q), cfg.Settings.Gamma).Start()
	exploring := EpsilonSoft(q, func(s State) float64 { return cfg.Settings.epsilonFor(visits[s]) })
	report.Exploring = Evaluate(exploring, cfg.Settings.Gamma).Start()
	greedy := Greedy(q)
	for _, st := range Starts() {
		var shortfall float64
		for a, p := range greedy(st.State) {
			shortfall += p * (optimal.V[st.State] - optimal.Q[st.State][a])
		}
		report.FirstDay = append(report.FirstDay, FirstAction{
			State:     st.State,
			Learned:   Values{Q: q}.BestActions(st.State),
			Optimal:   optimal.BestActions(st.State),
			Shortfall: shortfall,
		})
	}
	return report, nil
}

// driver plays the simulated customers through the qtally client.
type driver struct {
	cfg   Config
	api   *client.Client
	runID string
}

func newDriver(cfg Config) (*driver, error) {
	transport := http.DefaultTransport.(*http.Transport).Clone()
	// Only the given address: no proxy from the environment.
	transport.Proxy = nil
	// Keep a connection per worker open instead of redialling.
	transport.MaxIdleConnsPerHost = cfg.Concurrency + 2
	api, err := client.New(cfg.BaseURL, client.Options{Token: cfg.Token,
		HTTPClient: &http.Client{Transport: transport, Timeout: 30 * time.Second}})
	if err != nil {
		return nil, err
	}
	return &driver{
		cfg: cfg,
		api: api,
		// Episode ids must not collide with an earlier run's on the same
		// policy, or the service would drop them as duplicates.
		runID: strconv.FormatInt(time.Now().UnixNano(), 36),
	}, nil
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

func (c *driver) putPolicy(ctx context.Context) error {
	st := c.cfg.Settings
	settings := client.Settings{Actions: ActionNames(), Gamma: st.Gamma, Alpha: st.Alpha, Epsilon: st.Epsilon,
		EpsilonMin: st.EpsilonMin, EpsilonDecayVisits: st.EpsilonDecayVisits, Visit: st.Visit, InitialQ: st.InitialQ,
		// The exact optimum is what the status page's learning curve
		// should approach.
		ReturnTarget: &client.ReturnTarget{Value: Optimal(st.Gamma).Start(), Label: "exact optimum"}}
	_, _, err := c.api.PutPolicy(ctx, c.cfg.Policy, settings, "")
	if client.ProblemOf(err) == client.ProblemPreconditionRequired {
		// The policy exists from an earlier run. The demo owns it, so its
		// settings replace whatever is there, on purpose.
		_, _, err = c.api.PutPolicy(ctx, c.cfg.Policy, settings, client.IfMatchAny)
	}
	if err != nil {
		if client.ProblemOf(err) == client.ProblemConflict {
			return fmt.Errorf("policy %q already learned with other actions; choose another policy name: %w", c.cfg.Policy, err)
		}
		return err
	}
	return nil
}

func (c *driver) policyStatus(ctx context.Context) (client.PolicyStatus, error) {
	return c.api.Policy(ctx, c.cfg.Policy)
}

// playEpisode runs one customer: the service chooses each day's action,
// exploring, and the model answers with what the customer did. The
// recorder logs each step from the choice itself; with KeepEpisodes qtally
// records each decision instead, the rewards are added as they happen and
// the episode is ended when the case closes (ended counts it).
func (c *driver) playEpisode(ctx context.Context, n int, actions map[string]Action, rec *client.Recorder, ended *atomic.Int64) (float64, error) {
	rng := rand.New(rand.NewPCG(c.cfg.Seed, uint64(n)))
	id := fmt.Sprintf("demo-%s-%d", c.runID, n)
	var recording *client.Recording
	if !c.cfg.KeepEpisodes {
		recording = rec.Start(id)
	}
	var ret, discount float64 = 0, 1
	s := SampleStart(rng)
	for day := 0; ; day++ {
		req := client.ChooseRequest{State: s.String(), Mode: client.Explore}
		var choice client.Choice
		var err error
		if c.cfg.KeepEpisodes {
			// Recorded by qtally before it answers; a retry of the same
			// step gets the same answer.
			choice, err = c.api.ChooseRecorded(ctx, c.cfg.Policy, id, day, req)
		} else {
			choice, err = c.api.Choose(ctx, c.cfg.Policy, req)
		}
		if err != nil {
			return 0, err
		}
		a, ok := actions[choice.Action]
		if !ok {
			return 0, fmt.Errorf("choose answered unknown action %q", choice.Action)
		}
		o := Step(s, a, rng)
		if c.cfg.KeepEpisodes {
			if o.Reward != 0 {
				// The key makes a retried addition count once.
				opts := client.RewardOptions{Key: fmt.Sprintf("day-%d", day)}
				if _, err := c.api.AddReward(ctx, c.cfg.Policy, id, o.Reward, opts); err != nil {
					return 0, err
				}
			}
		} else {
			recording.Step(choice)
			recording.Reward(o.Reward)
		}
		ret += discount * o.Reward
		discount *= c.cfg.Settings.Gamma
		if o.Done {
			if !c.cfg.KeepEpisodes {
				return ret, recording.End(ctx)
			}
			if _, err := c.api.EndEpisode(ctx, c.cfg.Policy, id, nil); err != nil {
				return 0, err
			}
			ended.Add(1)
			return ret, nil
		}
		s = o.Next
	}
}

// window is a running mean over the most recent returns.
type window struct {
	returns []float64
	next    int
	full    bool
}

func newWindow(size int) *window { return &window{returns: make([]float64, size)} }

func (w *window) add(g float64) {
	w.returns[w.next] = g
	w.next = (w.next + 1) % len(w.returns)
	w.full = w.full || w.next == 0
}

func (w *window) len() int {
	if w.full {
		return len(w.returns)
	}
	return w.next
}

func (w *window) mean() float64 {
	n := w.len()
	if n == 0 {
		return math.NaN()
	}
	var total float64
	for _, g := range w.returns[:n] {
		total += g
	}
	return total / float64(n)
}

type trafficResult struct {
	sent, duplicates int
	window           *window
}

// sendTraffic starts episodes at the configured rate and plays them on
// Concurrency workers; a recorder posts them in batches of BatchSize (or,
// with KeepEpisodes, each is ended in qtally). It prints progress as the
// service answers.
func (c *driver) sendTraffic(ctx context.Context, out io.Writer) (trafficResult, error) {
	g, ctx := errgroup.WithContext(ctx)
	jobs := make(chan int)
	returns := make(chan float64, c.cfg.Concurrency)
	result := trafficResult{window: newWindow(c.cfg.Window)}
	rec := c.api.NewRecorder(c.cfg.Policy, client.RecorderOptions{BatchSize: c.cfg.BatchSize})
	// Episodes qtally keeps are counted as they end; the recorder then
	// has nothing to post.
	var ended atomic.Int64
	stats := func() (sent, duplicates int) {
		if c.cfg.KeepEpisodes {
			return int(ended.Load()), 0
		}
		st := rec.Stats()
		return int(st.Accepted + st.Duplicates), int(st.Duplicates)
	}

	g.Go(func() error {
		defer close(jobs)
		return c.dispatch(ctx, jobs)
	})

	actions := make(map[string]Action, numActions)
	for _, a := range Actions() {
		actions[a.String()] = a
	}
	var workers sync.WaitGroup
	for range c.cfg.Concurrency {
		workers.Add(1)
		g.Go(func() error {
			defer workers.Done()
			for n := range jobs {
				ret, err := c.playEpisode(ctx, n, actions, rec, &ended)
				if err != nil {
					return err
				}
				select {
				case returns <- ret:
				case <-ctx.Done():
					return ctx.Err()
				}
			}
			return nil
		})
	}
	go func() {
		workers.Wait()
		close(returns)
	}()

	g.Go(func() error {
		start := time.Now()
		printed := -1
		progress := func() {
			result.sent, result.duplicates = stats()
			if result.sent != printed {
				c.progress(out, start, result)
				printed = result.sent
			}
		}
		ticker := time.NewTicker(c.cfg.ProgressInterval)
		defer ticker.Stop()
		for {
			select {
			case ret, ok := <-returns:
				if !ok {
					if err := rec.Close(ctx); err != nil {
						return err
					}
					progress()
					return nil
				}
				result.window.add(ret)
			case <-ticker.C:
				if err := rec.Err(); err != nil {
					return err
				}
				progress()
			case <-ctx.Done():
				return ctx.Err()
			}
		}
	})

	err := g.Wait()
	if err != nil {
		// Episodes already ended are still posted, within a bound.
		closing, cancel := context.WithTimeout(context.WithoutCancel(ctx), 10*time.Second)
		defer cancel()
		_ = rec.Close(closing)
		return trafficResult{}, err
	}
	return result, nil
}

func (c *driver) progress(out io.Writer, start time.Time, r trafficResult) {
	fmt.Fprintf(out, "%6.1fs  episodes sent %7d  mean return of last %d: %.3f\n",
		time.Since(start).Seconds(), r.sent, r.window.len(), r.window.mean())
}

// dispatch hands out episode numbers, the nth due n/Rate seconds after the
// start, until the duration or the budget is used up.
func (c *driver) dispatch(ctx context.Context, jobs chan<- int) error {
	start := time.Now()
	for n := 0; c.cfg.Episodes == 0 || n < c.cfg.Episodes; n++ {
		if c.cfg.Rate > 0 {
			due := start.Add(time.Duration(float64(n) / c.cfg.Rate * float64(time.Second)))
			if err := sleep(ctx, time.Until(due)); err != nil {
				return err
			}
		}
		if c.cfg.Duration > 0 && time.Since(start) >= c.cfg.Duration {
			return nil
		}
		select {
		case jobs <- n:
		case <-ctx.Done():
			return ctx.Err()
		}
	}
	return nil
}

// settle waits until the worker has trained every stored episode of the
// policy, or SettleTimeout passes; it returns how many were left.
func (c *driver) settle(ctx context.Context) (int64, error) {
	wait, cancel := context.WithTimeout(ctx, c.cfg.SettleTimeout)
	defer cancel()
	st, err := c.api.WaitTrained(wait, c.cfg.Policy)
	if err != nil && ctx.Err() == nil && wait.Err() != nil {
		// The settle timeout ran out: report what is left.
		st, err = c.policyStatus(ctx)
	}
	return st.Backlog, err
}

// readQ fetches the service's Q for every state of the model, and each
// state's visits over all actions.
func (c *driver) readQ(ctx context.Context) (map[State][]float64, map[State]int64, error) {
	states := States()
	rows := make([][]float64, len(states))
	totals := make([]int64, len(states))
	g, ctx := errgroup.WithContext(ctx)
	g.SetLimit(c.cfg.Concurrency)
	for i, s := range states {
		g.Go(func() error {
			view, err := c.api.State(ctx, c.cfg.Policy, s.String())
			if err != nil {
				return err
			}
			row, err := qRow(view)
			if err != nil {
				return fmt.Errorf("state %s: %w", s, err)
			}
			rows[i] = row
			for _, av := range view.Actions {
				totals[i] += av.Visits
			}
			return nil
		})
	}
	if err := g.Wait(); err != nil {
		return nil, nil, err
	}
	q := make(map[State][]float64, len(states))
	visits := make(map[State]int64, len(states))
	for i, s := range states {
		q[s], visits[s] = rows[i], totals[i]
	}
	return q, visits, nil
}

// qRow puts a state's action values in Actions order.
func qRow(view client.StateView) ([]float64, error) {
	row := make([]float64, numActions)
	seen := make([]bool, numActions)
	for _, av := range view.Actions {
		for _, a := range Actions() {
			if a.String() == av.Action {
				row[a], seen[a] = av.Q, true
			}
		}
	}
	for _, a := range Actions() {
		if !seen[a] {
			return nil, fmt.Errorf("no value for action %s", a)
		}
	}
	return row, nil
}
