package systemtest

import (
	"fmt"
	"math"
	"math/rand/v2"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/internal/cardgame"
	"github.com/qtally/qtally/storage/pgtest"
)

type interval struct {
	Low  float64 `json:"low"`
	High float64 `json:"high"`
}

// intervalEstimate is an estimate (null, here 0, when too large for a
// float64) with its interval (nil when left out).
type intervalEstimate struct {
	Estimate float64   `json:"estimate"`
	Interval *interval `json:"interval"`
}

type evaluationResult struct {
	Ordinary                     intervalEstimate `json:"ordinary"`
	Weighted                     intervalEstimate `json:"weighted"`
	PerDecision                  intervalEstimate `json:"per_decision"`
	PerDecisionMinusBehaviour    intervalEstimate `json:"per_decision_minus_behaviour"`
	MeanRatio                    intervalEstimate `json:"mean_ratio"`
	EffectiveSampleSize          float64          `json:"effective_sample_size"`
	LargestWeightShare           float64          `json:"largest_weight_share"`
	LargestRatioLog10            *float64         `json:"largest_ratio_log10"`
	WeightlessResampleShare      float64          `json:"weightless_resample_share"`
	BehaviourMeanReturn          float64          `json:"behaviour_mean_return"`
	EpisodesRead                 int64            `json:"episodes_read"`
	EpisodesUsed                 int64            `json:"episodes_used"`
	EpisodesWithoutProbabilities int64            `json:"episodes_without_probabilities"`
	ZeroWeightEpisodes           int64            `json:"zero_weight_episodes"`
	EpisodesTrainedIntoTarget    int64            `json:"episodes_trained_into_target"`
	Inputs                       evaluationInputs `json:"inputs"`
	Seed                         int64            `json:"seed"`
	Notes                        []string         `json:"notes"`
}

type evaluationInputs struct {
	Gamma         float64  `json:"gamma"`
	Policy        string   `json:"policy"`
	Table         string   `json:"table"`
	TableRevision int64    `json:"table_revision"`
	InitialQ      float64  `json:"initial_q"`
	Mode          string   `json:"mode"`
	Epsilon       *float64 `json:"epsilon"`
	EpsilonRule   *struct {
		Epsilon            float64 `json:"epsilon"`
		EpsilonMin         float64 `json:"epsilon_min"`
		EpsilonDecayVisits float64 `json:"epsilon_decay_visits"`
	} `json:"epsilon_rule"`
}

// noteWith returns the first note containing part, or "".
func noteWith(notes []string, part string) string {
	for _, n := range notes {
		if strings.Contains(n, part) {
			return n
		}
	}
	return ""
}

type progress struct {
	Phase string `json:"phase"`
	Done  int64  `json:"done"`
	Total int64  `json:"total"`
}

type jobView[R any] struct {
	ID       int64    `json:"id"`
	Status   string   `json:"status"`
	Progress progress `json:"progress"`
	Result   *R       `json:"result"`
	Error    string   `json:"error"`
	Episodes struct {
		Episodes int64 `json:"episodes"`
	} `json:"episodes"`
}

// startJob posts a job and follows it to its end, returning the final view
// and every progress report seen on the way.
func startJob[R any](s *service, path string, body any, within time.Duration) (jobView[R], []progress) {
	s.t.Helper()
	r := s.call("POST", path, body, 202)
	var job jobView[R]
	r.decode(s.t, &job)
	loc := r.Header.Get("Location")
	if want := fmt.Sprintf("%s/%d", path, job.ID); loc != want {
		s.t.Fatalf("Location %q, want %q", loc, want)
	}
	var seen []progress
	waitFor(s.t, within, "job "+loc+" to end", func() bool {
		s.call("GET", loc, nil, 200).decode(s.t, &job)
		if len(seen) == 0 || seen[len(seen)-1] != job.Progress {
			seen = append(seen, job.Progress)
		}
		return job.Status == "succeeded" || job.Status == "failed"
	})
	return job, seen
}

// cardGameTable is a CSV table whose greedy policy is the target of the
// book's Example 5.4, "stick only on 20 or 21", on every reachable state.
func cardGameTable() string {
	var b strings.Builder
	b.WriteString("state,action,q,visits\n")
	for player := 12; player <= 21; player++ {
		for _, ace := range []bool{false, true} {
			for dealer := 1; dealer <= 10; dealer++ {
				key := cardgame.State{Player: player, UsableAce: ace, Dealer: dealer}.Key()
				stick := 0
				if player >= 20 {
					stick = 1
				}
				fmt.Fprintf(&b, "%s,stick,%d,1\n%s,hit,%d,1\n", key, stick, key, 1-stick)
			}
		}
	}
	return b.String()
}

// cardGameEpisodes plays n games from the Example 5.4 state with the
// uniformly random behaviour, each step carrying its probability 0.5.
func cardGameEpisodes(rng *rand.Rand, prefix string, n int) []episodeJSON {
	half := cardgame.BehaviourProbability
	eps := make([]episodeJSON, n)
	for i := range eps {
		steps := cardgame.PlayFrom(cardgame.ExampleStart, cardgame.Random(rng), rng)
		ep := episodeJSON{ID: fmt.Sprintf("%s-%d", prefix, i)}
		for _, st := range steps {
			ep.Steps = append(ep.Steps, stepJSON{State: st.State.Key(), Action: st.Action, Reward: st.Reward, Probability: &half})
		}
		eps[i] = ep
	}
	return eps
}

// Sutton & Barto, Reinforcement Learning: An Introduction, 2nd ed.,
// Example 5.4: the card game state "player sum 13 with a usable ace, dealer
// showing 2" has value -0.27726 under "stick only on 20 or 21" (the book's
// figure). From 100,000 episodes of the uniformly random behaviour, posted
// with their probabilities, the weighted importance-sampling estimate must
// be within 0.02 of it and the ordinary estimate's 95% interval must cover
// it. The target is made the greedy policy of an imported table, frozen as
// a snapshot while training changes the live table; after restoring the
// snapshot the live table must evaluate identically.
func TestOffPolicyEvaluationReproducesTheBooksExample(t *testing.T) {
	t.Parallel()
	const episodes, perRequest = 100_000, 25_000
	s := startService(t, pgtest.NewDatabase(t), "serve",
		"--max-episodes-per-request", fmt.Sprint(perRequest), "--batch-episodes", "5000")
	s.call("PUT", "/v1/policies/cards", map[string]any{"actions": cardgame.Actions, "gamma": 1, "alpha": 0.05}, 201)
	s.send("PUT", "/v1/policies/cards/table", "text/csv", []byte(cardGameTable()), false)
	s.call("POST", "/v1/policies/cards/snapshots", map[string]any{"name": "stick-on-20"}, 201)

	rng := rand.New(rand.NewPCG(5, 4))
	start := time.Now()
	for b := range episodes / perRequest {
		r := s.send("POST", "/v1/policies/cards/episodes", "application/x-ndjson", ndjson(t, cardGameEpisodes(rng, fmt.Sprint(b), perRequest)), false)
		if r.Status != 202 {
			t.Fatalf("batch %d: %d %s", b, r.Status, r.Body)
		}
	}
	t.Logf("posted %d episodes in %v", episodes, time.Since(start))

	start = time.Now()
	job, seen := startJob[evaluationResult](s, "/v1/policies/cards/evaluations",
		map[string]any{"target": map[string]any{"table": "stick-on-20"}, "seed": 2024}, 2*time.Minute)
	if job.Status != "succeeded" {
		t.Fatalf("evaluation %s: %s", job.Status, job.Error)
	}
	res := *job.Result
	t.Logf("evaluated in %v; progress seen: %v", time.Since(start), seen)
	for name, e := range map[string]intervalEstimate{"ordinary": res.Ordinary, "weighted": res.Weighted, "per-decision": res.PerDecision,
		"per-decision minus behaviour": res.PerDecisionMinusBehaviour, "mean ratio": res.MeanRatio} {
		if e.Interval == nil {
			t.Fatalf("%s: no interval; notes %q", name, res.Notes)
		}
		t.Logf("%s %.5f [%.5f, %.5f]", name, e.Estimate, e.Interval.Low, e.Interval.High)
	}
	t.Logf("weighted %.5f [%.5f, %.5f]; ordinary %.5f [%.5f, %.5f]; book %.5f; ESS %.1f; zero-weight %d of %d; behaviour's mean return %.4f",
		res.Weighted.Estimate, res.Weighted.Interval.Low, res.Weighted.Interval.High,
		res.Ordinary.Estimate, res.Ordinary.Interval.Low, res.Ordinary.Interval.High, cardgame.ExampleStartValue,
		res.EffectiveSampleSize, res.ZeroWeightEpisodes, res.EpisodesUsed, res.BehaviourMeanReturn)
	if math.Abs(res.Weighted.Estimate-cardgame.ExampleStartValue) > 0.02 {
		t.Errorf("weighted estimate %.5f is not within 0.02 of the book's %.5f", res.Weighted.Estimate, cardgame.ExampleStartValue)
	}
	if !(res.Ordinary.Interval.Low <= cardgame.ExampleStartValue && cardgame.ExampleStartValue <= res.Ordinary.Interval.High) {
		t.Errorf("ordinary interval [%.5f, %.5f] misses the book's %.5f", res.Ordinary.Interval.Low, res.Ordinary.Interval.High, cardgame.ExampleStartValue)
	}
	// All reward comes at the end of a game and gamma is 1, so the
	// per-decision estimate is the ordinary one (Sutton & Barto, 2nd ed.,
	// section 5.9); the probabilities are right, so the mean ratio's
	// interval holds 1 (section 5.5) and no warning is given.
	if math.Abs(res.PerDecision.Estimate-res.Ordinary.Estimate) > 1e-9 {
		t.Errorf("per-decision %v differs from ordinary %v with all reward at the end", res.PerDecision.Estimate, res.Ordinary.Estimate)
	}
	if d := res.PerDecisionMinusBehaviour.Estimate - (res.PerDecision.Estimate - res.BehaviourMeanReturn); math.Abs(d) > 1e-9 {
		t.Errorf("difference %v is not per-decision minus behaviour mean", res.PerDecisionMinusBehaviour.Estimate)
	}
	if iv := res.MeanRatio.Interval; iv.Low > 1 || iv.High < 1 || noteWith(res.Notes, "warning") != "" {
		t.Errorf("mean ratio %v [%v, %v], notes %q", res.MeanRatio.Estimate, iv.Low, iv.High, res.Notes)
	}
	if in := res.Inputs; in.Gamma != 1 || in.Policy != "cards" || in.Table != "stick-on-20" || in.InitialQ != 0 || in.Mode != "greedy" || in.Epsilon != nil || in.EpsilonRule != nil {
		t.Errorf("inputs %+v", in)
	}
	if res.EpisodesRead != episodes || res.EpisodesUsed != episodes || res.EpisodesWithoutProbabilities != 0 || job.Episodes.Episodes != episodes {
		t.Errorf("episode counts: %+v, window %d", res, job.Episodes.Episodes)
	}
	// Only games whose every random choice matched the target count: far
	// fewer than all, far more than none; the weights' worth is below that.
	if res.ZeroWeightEpisodes < episodes/2 || res.ZeroWeightEpisodes > episodes-episodes/20 ||
		!(res.EffectiveSampleSize > 100 && res.EffectiveSampleSize < float64(episodes-res.ZeroWeightEpisodes)) {
		t.Errorf("zero-weight episodes %d, effective sample size %.1f", res.ZeroWeightEpisodes, res.EffectiveSampleSize)
	}
	if last := seen[len(seen)-1]; last.Phase != "done" || last.Done != 1000 || last.Total != 1000 {
		t.Errorf("final progress %+v, want done 1000 of 1000 resamples", last)
	}

	// Training has moved the live table away; the restored snapshot, now
	// live, must give exactly the same answer with the same seed, and name
	// the live table as its input.
	s.waitTrained("cards", episodes)
	s.call("POST", "/v1/policies/cards/snapshots/stick-on-20/restore", nil, 200)
	again, _ := startJob[evaluationResult](s, "/v1/policies/cards/evaluations",
		map[string]any{"target": map[string]any{"table": "live", "mode": "greedy"}, "seed": 2024, "window": map[string]any{"last": episodes}}, 2*time.Minute)
	if again.Status != "succeeded" {
		t.Fatalf("live table after restore: %s %s", again.Status, again.Error)
	}
	if in := again.Result.Inputs; in.Table != "live" || in.TableRevision <= res.Inputs.TableRevision {
		t.Errorf("inputs after restore %+v, snapshot's %+v", in, res.Inputs)
	}
	again.Result.Inputs = res.Inputs
	if !reflect.DeepEqual(*again.Result, res) {
		t.Fatalf("live table after restore: %+v, snapshot gave %+v", again.Result, res)
	}
}

// Episodes without behaviour probabilities are counted and left out, a
// window with none usable is refused with a message saying why, and
// windows select the episodes they name.
func TestEvaluationWindowsAndUnusableEpisodes(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	s.call("PUT", "/v1/policies/nudges", map[string]any{"actions": []string{"remind", "skip"}, "gamma": 0.5}, 201)
	s.call("PUT", "/v1/policies/nudges/table", map[string]any{"rows": []tableRow{{"cart", "remind", 1, 1}, {"cart", "skip", 0, 1}}}, 200)
	// Three episodes without probabilities first. The worker trains every
	// episode into the live table, so each result notes that it is judged
	// on episodes it learned from.
	s.post("nudges", oneStep("plain-1", "cart", "remind", 1), oneStep("plain-2", "cart", "skip", 1), oneStep("plain-3", "cart", "remind", 0))
	r := s.call("POST", "/v1/policies/nudges/evaluations", map[string]any{}, 400)
	if !strings.Contains(string(r.Body), "none of its 3 episodes carries behaviour probabilities") {
		t.Fatalf("no usable episodes: %s", r.Body)
	}
	p := func(x float64) *float64 { return &x }
	s.post("nudges",
		episodeJSON{ID: "p-1", Steps: []stepJSON{{State: "cart", Action: "remind", Reward: 1, Probability: p(0.8)}, {State: "cart", Action: "remind", Reward: 2, Probability: p(0.5)}}},
		episodeJSON{ID: "p-2", Steps: []stepJSON{{State: "cart", Action: "skip", Reward: 4, Probability: p(0.2)}}},
		// A step without its probability leaves the whole episode out.
		episodeJSON{ID: "p-3", Steps: []stepJSON{{State: "cart", Action: "remind", Reward: 1, Probability: p(0.8)}, {State: "cart", Action: "remind", Reward: 9}}})

	s.waitTrained("nudges", 6)
	job, _ := startJob[evaluationResult](s, "/v1/policies/nudges/evaluations", map[string]any{"seed": 1, "resamples": 200}, 30*time.Second)
	res := job.Result
	// Greedy target: remind with probability 1. p-1: rho = (1/0.8)(1/0.5) =
	// 2.5, G0 = 1 + 0.5*2 = 2; p-2: rho = 0, G0 = 4. Ordinary = (2.5*2 + 0)/2
	// = 2.5; weighted = 5/2.5 = 2; ESS = 2.5^2/2.5^2 = 1; behaviour mean 3.
	// Per-decision (Sutton & Barto, 2nd ed., section 5.9): p-1 gives
	// 1.25*1 + 0.5*2.5*2 = 3.75, p-2 gives 0, so 1.875, and 1.875 - 3 =
	// -1.125 over the behaviour; mean ratio (2.5 + 0)/2 = 1.25.
	near := func(a, b float64) bool { return math.Abs(a-b) < 1e-12 }
	if job.Status != "succeeded" || res.EpisodesRead != 6 || res.EpisodesUsed != 2 || res.EpisodesWithoutProbabilities != 4 ||
		res.ZeroWeightEpisodes != 1 || !near(res.Ordinary.Estimate, 2.5) || res.Weighted.Estimate != 2 || res.EffectiveSampleSize != 1 ||
		res.BehaviourMeanReturn != 3 || noteWith(res.Notes, "4 episodes lack a behaviour probability") == "" ||
		noteWith(res.Notes, "3 steps in 2 of the episodes used carry no allowed set") == "" ||
		!near(res.PerDecision.Estimate, 1.875) || !near(res.PerDecisionMinusBehaviour.Estimate, -1.125) || !near(res.MeanRatio.Estimate, 1.25) ||
		res.LargestWeightShare != 1 || res.LargestRatioLog10 == nil || !near(*res.LargestRatioLog10, math.Log10(2.5)) {
		t.Fatalf("evaluation: %s %s %+v", job.Status, job.Error, res)
	}
	// One episode of weight among two: a resample misses it with chance
	// 1/4, so the weighted interval is left out and the note says why; the
	// weights are worth one episode.
	if res.Weighted.Interval != nil || noteWith(res.Notes, "no episode of positive weight") == "" || noteWith(res.Notes, "worth only 1.0") == "" {
		t.Fatalf("weighted interval %v, notes %q", res.Weighted.Interval, res.Notes)
	}
	if in := res.Inputs; in.Gamma != 0.5 || in.Table != "live" || in.Mode != "greedy" || in.Policy != "nudges" {
		t.Fatalf("inputs %+v", in)
	}
	// An epsilon-soft target with epsilon 0.5: remind 0.75, skip 0.25.
	// p-1: rho = (0.75/0.8)(0.75/0.5) = 1.40625, G0 = 2; p-2: 0.25/0.2 = 1.25, G0 = 4.
	job, _ = startJob[evaluationResult](s, "/v1/policies/nudges/evaluations",
		map[string]any{"target": map[string]any{"mode": "explore", "epsilon": 0.5}, "seed": 1, "resamples": 200}, 30*time.Second)
	if res := job.Result; job.Status != "succeeded" || math.Abs(res.Ordinary.Estimate-(1.40625*2+1.25*4)/2) > 1e-12 ||
		math.Abs(res.Weighted.Estimate-(1.40625*2+1.25*4)/(1.40625+1.25)) > 1e-12 || res.Inputs.Epsilon == nil || *res.Inputs.Epsilon != 0.5 {
		t.Fatalf("epsilon-soft evaluation: %s %+v", job.Status, job.Result)
	}
	// Without a fixed rate the policy's own rule applies, and is reported.
	job, _ = startJob[evaluationResult](s, "/v1/policies/nudges/evaluations",
		map[string]any{"target": map[string]any{"mode": "explore"}, "seed": 1, "resamples": 200}, 30*time.Second)
	if rule := job.Result.Inputs.EpsilonRule; job.Status != "succeeded" || rule == nil || rule.Epsilon != 0.1 || job.Result.Inputs.Epsilon != nil {
		t.Fatalf("explore with the policy's rule: %s %+v", job.Status, job.Result.Inputs)
	}
	// The last two episodes: p-2 is usable, p-3 is not.
	job, _ = startJob[evaluationResult](s, "/v1/policies/nudges/evaluations", map[string]any{"window": map[string]any{"last": 2}, "seed": 1}, 30*time.Second)
	if res := job.Result; job.Status != "succeeded" || res.EpisodesRead != 2 || res.EpisodesUsed != 1 || res.ZeroWeightEpisodes != 1 ||
		noteWith(res.Notes, "1 episodes lack") == "" || noteWith(res.Notes, "carry no allowed set") == "" || noteWith(res.Notes, "every episode used took some action the target never takes") == "" {
		t.Fatalf("last 2: %s %+v", job.Status, res)
	}
	// A time range before anything was stored holds nothing.
	r = s.call("POST", "/v1/policies/nudges/evaluations", map[string]any{"window": map[string]any{"until": "2001-01-01T00:00:00Z"}}, 400)
	if !strings.Contains(string(r.Body), "holds no stored episodes") {
		t.Fatalf("empty window: %s", r.Body)
	}
	s.call("POST", "/v1/policies/nudges/evaluations", map[string]any{"window": map[string]any{"last": 2, "since": "2001-01-01T00:00:00Z"}}, 400)
	s.call("POST", "/v1/policies/nudges/evaluations", map[string]any{"target": map[string]any{"table": "gone"}}, 404)
	s.call("POST", "/v1/policies/nudges/evaluations", map[string]any{"target": map[string]any{"epsilon": 0.1}}, 400)
	s.call("PUT", "/v1/policies/other", map[string]any{"actions": []string{"a", "b"}}, 201)
	s.call("POST", "/v1/policies/nudges/evaluations", map[string]any{"target": map[string]any{"policy": "other"}}, 409)
	s.call("GET", "/v1/policies/nudges/evaluations/999", nil, 404)
	s.call("GET", "/v1/policies/nudges/replays/1", nil, 404) // job 1 is an evaluation
}

// Ratios far beyond what squares of float64 hold must not break the
// result: 80-step episodes whose every action the greedy target takes
// with probability 1 and the behaviour took with 0.01 have rho = 100^80 =
// 1e160, so sum rho^2 overflows. Weighted importance sampling and the
// effective sample size do not depend on the ratios' scale (Sutton &
// Barto, 2nd ed., eq. 5.6: a common factor cancels), so the job must
// finish with finite numbers.
func TestEvaluationSurvivesHugeRatios(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	s.call("PUT", "/v1/policies/ticks", map[string]any{"actions": []string{"hold", "sell"}, "gamma": 1}, 201)
	s.call("PUT", "/v1/policies/ticks/table", map[string]any{"rows": []tableRow{{"tick", "hold", 1, 1}, {"tick", "sell", 0, 1}}}, 200)
	rare, common := 0.01, 0.99
	var eps []episodeJSON
	for i := range 6 {
		ep := episodeJSON{ID: fmt.Sprintf("long-%d", i)}
		for range 80 {
			ep.Steps = append(ep.Steps, stepJSON{State: "tick", Action: "hold", Reward: float64(i % 3), Probability: &rare})
		}
		eps = append(eps, ep)
	}
	for i := range 20 {
		eps = append(eps, episodeJSON{ID: fmt.Sprintf("sold-%d", i), Steps: []stepJSON{{State: "tick", Action: "sell", Reward: 5, Probability: &common}}})
	}
	s.post("ticks", eps...)
	job, _ := startJob[evaluationResult](s, "/v1/policies/ticks/evaluations", map[string]any{"seed": 5, "resamples": 500}, 30*time.Second)
	if job.Status != "succeeded" {
		t.Fatalf("evaluation %s: %s", job.Status, job.Error)
	}
	res := job.Result
	t.Logf("notes: %q", res.Notes)
	// Returns 0, 80, 160, 0, 80, 160 with equal weights: weighted 80, ESS 6;
	// ordinary 1e160 * 480 / 26, too large to believe and named in a note.
	if math.Abs(res.Weighted.Estimate-80) > 1e-9 || math.Abs(res.EffectiveSampleSize-6) > 1e-9 || res.ZeroWeightEpisodes != 20 ||
		math.Abs(res.Ordinary.Estimate/(1e160*480/26)-1) > 1e-9 || res.LargestRatioLog10 == nil || math.Abs(*res.LargestRatioLog10-160) > 1e-9 ||
		!strings.Contains(noteWith(res.Notes, "importance ratio above"), `"long-0" (1e160)`) {
		t.Fatalf("weighted %v, ESS %v, zero weight %d, ordinary %v, notes %q", res.Weighted.Estimate, res.EffectiveSampleSize, res.ZeroWeightEpisodes, res.Ordinary.Estimate, res.Notes)
	}

	// Two 200-step episodes: rho = 1e400, beyond a float64. They carry all
	// the weight (the others are 1e-240 of them); the estimates that are
	// not scale-free cannot be represented and are null, with a note.
	var longer []episodeJSON
	for i := range 2 {
		ep := episodeJSON{ID: fmt.Sprintf("longer-%d", i)}
		for range 200 {
			ep.Steps = append(ep.Steps, stepJSON{State: "tick", Action: "hold", Reward: float64(i), Probability: &rare})
		}
		longer = append(longer, ep)
	}
	s.post("ticks", longer...)
	var raw map[string]any
	job, _ = startJob[evaluationResult](s, "/v1/policies/ticks/evaluations", map[string]any{"seed": 5, "resamples": 500}, 30*time.Second)
	if job.Status != "succeeded" {
		t.Fatalf("evaluation %s: %s", job.Status, job.Error)
	}
	s.call("GET", fmt.Sprintf("/v1/policies/ticks/evaluations/%d", job.ID), nil, 200).decode(t, &raw)
	ordinary := raw["result"].(map[string]any)["ordinary"].(map[string]any)
	res = job.Result
	t.Logf("notes: %q", res.Notes)
	if math.Abs(res.Weighted.Estimate-100) > 1e-9 || math.Abs(res.EffectiveSampleSize-2) > 1e-9 || ordinary["estimate"] != nil ||
		noteWith(res.Notes, "the ordinary estimate is too large") == "" || math.Abs(*res.LargestRatioLog10-400) > 1e-9 {
		t.Fatalf("weighted %v, ESS %v, ordinary %v, notes %q", res.Weighted.Estimate, res.EffectiveSampleSize, ordinary, res.Notes)
	}
}

// Resamples without weight are not estimates: 100 episodes of which some
// agree with the greedy target (return 10) and the rest take the other
// action (ratio 0). Weighted importance sampling (Sutton & Barto, 2nd ed.,
// eq. 5.6) gives 10 and so does every resample that draws an agreeing
// episode; one that draws none has no estimate. With 3 agreeing that
// happens with chance 0.97^100 = 4.8%, more than the 2.5% a 95% interval
// leaves in a tail: the interval is withheld with a note. With 6 agreeing,
// 0.94^100 = 0.2%: the interval is [10, 10].
func TestEvaluationWithholdsIntervalsSetByResamplesWithoutWeight(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	half := 0.5
	for _, agree := range []int{3, 6} {
		name := fmt.Sprintf("agree-%d", agree)
		s.call("PUT", "/v1/policies/"+name, map[string]any{"actions": []string{"call", "wait"}}, 201)
		s.call("PUT", "/v1/policies/"+name+"/table", map[string]any{"rows": []tableRow{{"lead", "call", 1, 1}, {"lead", "wait", 0, 1}}}, 200)
		eps := make([]episodeJSON, 100)
		for i := range eps {
			step := stepJSON{State: "lead", Action: "wait", Reward: 2, Probability: &half}
			if i < agree {
				step = stepJSON{State: "lead", Action: "call", Reward: 10, Probability: &half}
			}
			eps[i] = episodeJSON{ID: fmt.Sprint(i), Steps: []stepJSON{step}}
		}
		s.post(name, eps...)
		job, _ := startJob[evaluationResult](s, "/v1/policies/"+name+"/evaluations", map[string]any{"seed": 11, "resamples": 2000}, 30*time.Second)
		if job.Status != "succeeded" {
			t.Fatalf("%s: %s %s", name, job.Status, job.Error)
		}
		res := job.Result
		miss := math.Pow(1-float64(agree)/100, 100)
		t.Logf("%s: weighted %v %v, weightless share %v (expected %.4f), notes %q", name, res.Weighted.Estimate, res.Weighted.Interval, res.WeightlessResampleShare, miss, res.Notes)
		// The share is binomial over 2000 resamples: within 4 standard deviations.
		if res.Weighted.Estimate != 10 || math.Abs(res.WeightlessResampleShare-miss) > 4*math.Sqrt(miss*(1-miss)/2000) {
			t.Errorf("%s: weighted %v, weightless share %v, want 10 and %.4f", name, res.Weighted.Estimate, res.WeightlessResampleShare, miss)
		}
		withheld := noteWith(res.Notes, "no episode of positive weight")
		switch {
		case agree == 3 && (res.Weighted.Interval != nil || withheld == ""):
			t.Errorf("%s: weighted interval %v, notes %q; want it withheld with a note", name, res.Weighted.Interval, res.Notes)
		case agree == 6 && (res.Weighted.Interval == nil || *res.Weighted.Interval != interval{Low: 10, High: 10} || withheld != ""):
			t.Errorf("%s: weighted interval %v, notes %q; want [10, 10]", name, res.Weighted.Interval, res.Notes)
		}
	}
}
