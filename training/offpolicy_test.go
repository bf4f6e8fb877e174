package training_test

import (
	"context"
	"errors"
	"math"
	"math/rand/v2"
	"strings"

	"slices"
	"testing"

	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distuv"

	"github.com/qtally/qtally/internal/cardgame"
	"github.com/qtally/qtally/training"
)

// stickOn20Table is a Q table whose greedy policy is the card game's
// "stick only on 20 or 21", over every state the game can reach.
func stickOn20Table() *training.QTable {
	t := training.NewQTable(cardgame.Actions, 0)
	for player := 12; player <= 21; player++ {
		for _, ace := range []bool{false, true} {
			for dealer := 1; dealer <= 10; dealer++ {
				key := cardgame.State{Player: player, UsableAce: ace, Dealer: dealer}.Key()
				stick := 0.0
				if player >= 20 {
					stick = 1
				}
				t.Set(key, 0, stick, 1)
				t.Set(key, 1, 1-stick, 1)
			}
		}
	}
	return t
}

// behaviourEpisode plays the card game from the Example 5.4 state with
// the uniformly random behaviour and records it as the service stores it.
func behaviourEpisode(rng *rand.Rand) training.EpisodeRecord {
	steps := cardgame.PlayFrom(cardgame.ExampleStart, cardgame.Random(rng), rng)
	rec := training.EpisodeRecord{}
	for _, st := range steps {
		a := int16(0)
		if st.Action == cardgame.Hit {
			a = 1
		}
		rec.States = append(rec.States, st.State.Key())
		rec.Actions = append(rec.Actions, a)
		rec.Rewards = append(rec.Rewards, st.Reward)
		rec.Probabilities = append(rec.Probabilities, cardgame.BehaviourProbability)
	}
	return rec
}

func episodeRatios(t *testing.T, target *training.TargetPolicy, rng *rand.Rand, n int) []training.EpisodeRatio {
	t.Helper()
	out := make([]training.EpisodeRatio, n)
	for i := range out {
		r, ok := training.ImportanceRatio(behaviourEpisode(rng), 1, target.Probability)
		if !ok {
			t.Fatal("an episode with every probability was refused")
		}
		out[i] = r
	}
	return out
}

// Sutton & Barto, 2nd ed., Example 5.4 and Figure 5.3: estimating the value
// of the Example 5.4 state (-0.27726) under "stick only on 20 or 21" from
// episodes of the uniformly random behaviour, weighted importance sampling
// has the lower error, by far in the early episodes. As in the figure, the
// mean squared error is averaged over 100 runs (seeded) and read after
// 1 to 1,000 episodes: the weighted estimate's must be the lower at every
// checkpoint, and at most half the ordinary one's up to 10 episodes. (Later
// the two converge: measured here on 2 million on-policy games, the
// per-episode variances they tend to are about 9.6 weighted and 10.2
// ordinary, so by 1,000 episodes the weighted lead is a few percent.)
func TestWeightedISHasLowerVarianceThanOrdinaryOnTheBooksExample(t *testing.T) {
	target := training.NewTargetPolicy(stickOn20Table(), training.Greedy, nil, training.DefaultSettings())
	rng := rand.New(rand.NewPCG(53, 53))
	const runs, episodes = 100, 1000
	checkpoints := []int{1, 3, 10, 30, 100, 300, 1000}
	mseOrd, mseWtd := make([]float64, len(checkpoints)), make([]float64, len(checkpoints))
	final := map[string][]float64{}
	for range runs {
		r := episodeRatios(t, target, rng, episodes)
		for i, n := range checkpoints {
			s := training.NewISSample(r[:n])
			ord, wtd := s.Ordinary(), s.Weighted()
			mseOrd[i] += (ord - cardgame.ExampleStartValue) * (ord - cardgame.ExampleStartValue) / runs
			mseWtd[i] += (wtd - cardgame.ExampleStartValue) * (wtd - cardgame.ExampleStartValue) / runs
		}
		s := training.NewISSample(r)
		final["ordinary"] = append(final["ordinary"], s.Ordinary())
		final["weighted"] = append(final["weighted"], s.Weighted())
	}
	for i, n := range checkpoints {
		t.Logf("after %4d episodes: mean squared error ordinary %.5f, weighted %.5f", n, mseOrd[i], mseWtd[i])
		if mseWtd[i] >= mseOrd[i] || (n <= 10 && mseWtd[i] > mseOrd[i]/2) {
			t.Errorf("after %d episodes weighted IS has MSE %.5f, ordinary %.5f: weighted should be clearly lower", n, mseWtd[i], mseOrd[i])
		}
	}
	// Both are consistent: after 1,000 episodes their run means lie near
	// the book's value.
	for name, xs := range final {
		mean, sd := stat.MeanStdDev(xs, nil)
		if se := sd / math.Sqrt(runs); math.Abs(mean-cardgame.ExampleStartValue) > 4*se {
			t.Errorf("%s estimates average %.4f, book value %.5f (standard error %.4f)", name, mean, cardgame.ExampleStartValue, se)
		}
	}
}

// The estimators on numbers worked by hand: ratios 2, 0, 4 and returns
// 1, 5, -1 give ordinary (2 + 0 - 4) / 3 = -2/3, weighted (2 - 4) / 6 =
// -1/3 and effective sample size 6^2 / 20 = 1.8.
func TestEstimatorsOnHandWorkedNumbers(t *testing.T) {
	s := training.ISSample{Episodes: []training.WeightedReturn{{Ratio: 2, Return: 1}, {Ratio: 0, Return: 5}, {Ratio: 4, Return: -1}}}
	for name, c := range map[string][2]float64{
		"ordinary":             {s.Ordinary(), -2.0 / 3},
		"weighted":             {s.Weighted(), -1.0 / 3},
		"ESS":                  {s.EffectiveSampleSize(), 1.8},
		"mean ratio":           {s.MeanRatio(), 2},
		"largest weight share": {s.LargestWeightShare(), 4.0 / 6},
	} {
		if math.Abs(c[0]-c[1]) > 1e-12 {
			t.Errorf("%s = %v, want %v", name, c[0], c[1])
		}
	}
	// All ratios zero: the weighted estimate is 0 by the book's convention
	// (eq. 5.6), and the weights are worth no episode at all.
	zero := training.ISSample{Episodes: []training.WeightedReturn{{Ratio: 0, Return: 3}}}
	if zero.Weighted() != 0 || zero.EffectiveSampleSize() != 0 {
		t.Error("all-zero weights")
	}
}

// The target's probabilities follow the epsilon-soft rule (Sutton & Barto,
// 2nd ed., section 5.4) with greedy ties split evenly, and an episode with
// a step lacking its behaviour probability is left out.
func TestTargetProbabilitiesAndRatios(t *testing.T) {
	table := training.NewQTable([]string{"a", "b", "c"}, 0)
	table.Set("tied", 0, 2, 5)
	table.Set("tied", 1, 2, 5)
	table.Set("one", 2, 1, 30)
	greedy := training.NewTargetPolicy(table, training.Greedy, nil, training.DefaultSettings())
	if p := []float64{greedy.Probability("tied", nil, 0), greedy.Probability("tied", nil, 1), greedy.Probability("tied", nil, 2)}; p[0] != 0.5 || p[1] != 0.5 || p[2] != 0 {
		t.Fatalf("greedy with a tie: %v, want [0.5 0.5 0]", p)
	}
	// In an unknown state no action is tried: greedy has no answer, so the
	// target takes none of them; with untried actions allowed to be greedy
	// every action ties at the initial value.
	if p := greedy.Probability("unseen", nil, 1); p != 0 {
		t.Fatalf("unseen state: %v, want 0", p)
	}
	untried := training.DefaultSettings()
	untried.GreedyUntried = true
	if p := training.NewTargetPolicy(table, training.Greedy, nil, untried).Probability("unseen", nil, 1); math.Abs(p-1.0/3) > 1e-15 {
		t.Fatalf("unseen state, untried actions allowed: %v, want 1/3", p)
	}
	eps := 0.3
	soft := training.NewTargetPolicy(table, training.Explore, &eps, training.DefaultSettings())
	if p := soft.Probability("one", nil, 2); math.Abs(p-(0.7+0.1)) > 1e-15 {
		t.Fatalf("epsilon-soft greedy action: %v, want 0.8", p)
	}
	if p := soft.Probability("one", nil, 0); math.Abs(p-0.1) > 1e-15 {
		t.Fatalf("epsilon-soft other action: %v, want 0.1", p)
	}
	// Without a fixed rate, the policy's own decayed rate for the state's
	// visits applies: 0.4 * 10 / (10 + 30) = 0.1.
	decayed := training.NewTargetPolicy(table, training.Explore, nil, training.Settings{Epsilon: 0.4, EpsilonDecayVisits: 10})
	if p := decayed.Probability("one", nil, 0); math.Abs(p-0.1/3) > 1e-15 {
		t.Fatalf("decayed epsilon-soft: %v, want 0.1/3", p)
	}

	ep := training.EpisodeRecord{States: []string{"tied", "one"}, Actions: []int16{1, 2}, Rewards: []float64{0, 1}, Probabilities: []float64{0.25, 0.5}}
	if r, ok := training.ImportanceRatio(ep, 1, greedy.Probability); !ok || math.Abs(math.Exp(r.LogRatio)-(0.5/0.25)*(1/0.5)) > 1e-14 {
		t.Fatalf("ratio %v %v, want 4", math.Exp(r.LogRatio), ok)
	}
	ep.Probabilities[1] = 0
	if _, ok := training.ImportanceRatio(ep, 1, greedy.Probability); ok {
		t.Fatal("a step without a behaviour probability must leave the episode out")
	}
	ep.Probabilities = nil
	if _, ok := training.ImportanceRatio(ep, 1, greedy.Probability); ok {
		t.Fatal("an episode without probabilities must be left out")
	}
}

// The bootstrap intervals must be close to the large-sample normal
// intervals estimate +- z(0.975) se (z from gonum's normal quantile): for
// the ordinary estimate and the mean ratio, means, se = sd/sqrt(n)
// (central limit theorem); for the weighted estimate, a ratio of means, the
// delta-method se = sqrt(sum rho^2 (G - w)^2) / sum rho (common practice
// for self-normalised weights); the per-decision returns are set to rho G,
// as they are when all reward comes at the end, and the difference is the
// mean of rho G - G. Once with every ratio 1, where the two estimates are
// the sample mean, and once with most ratios 0. The returns are skewed but
// the sample is large, so the bootstrap-t must agree with the normal
// theory within 20% of the half-width (its ends move with the skew; the
// normal interval's do not). Seeded, so repeatable.
func TestBootstrapIntervalsAgreeWithNormalTheory(t *testing.T) {
	for _, zeroShare := range []float64{0, 0.85} {
		rng := rand.New(rand.NewPCG(8, 9))
		const n = 4000
		s := training.ISSample{Episodes: make([]training.WeightedReturn, n)}
		for i := range s.Episodes {
			x := training.WeightedReturn{Ratio: 1, Return: rng.ExpFloat64()*2 - 1}
			if zeroShare > 0 {
				x.Ratio = 0
				if rng.Float64() >= zeroShare {
					x.Ratio = float64(2 + rng.IntN(6))
				}
			}
			x.PerDecision = x.Ratio * x.Return
			s.Episodes[i] = x
		}
		iv, err := training.BootstrapIS(context.Background(), s, 2000, 0.95, rand.New(rand.NewPCG(1, 2)), nil)
		if err != nil {
			t.Fatal(err)
		}
		z := distuv.UnitNormal.Quantile(0.975)
		products, ratios, differences := make([]float64, n), make([]float64, n), make([]float64, n)
		w := s.Weighted()
		sumRho, sumSq := 0.0, 0.0
		for i, x := range s.Episodes {
			products[i], ratios[i], differences[i] = x.Ratio*x.Return, x.Ratio, x.Ratio*x.Return-x.Return
			sumRho += x.Ratio
			sumSq += x.Ratio * x.Ratio * (x.Return - w) * (x.Return - w)
		}
		for _, c := range []struct {
			name         string
			got          *training.Interval
			center, half float64
		}{
			{"ordinary", iv.Ordinary, s.Ordinary(), z * stat.StdDev(products, nil) / math.Sqrt(n)},
			{"mean ratio", iv.MeanRatio, s.MeanRatio(), z * stat.StdDev(ratios, nil) / math.Sqrt(n)},
			{"weighted", iv.Weighted, w, z * math.Sqrt(sumSq) / sumRho},
			{"per-decision", iv.PerDecision, s.PerDecision(), z * stat.StdDev(products, nil) / math.Sqrt(n)},
			{"difference", iv.Difference, stat.Mean(differences, nil), z * stat.StdDev(differences, nil) / math.Sqrt(n)},
		} {
			if c.got == nil {
				t.Errorf("zero share %.2f: no %s interval", zeroShare, c.name)
				continue
			}
			t.Logf("zero share %.2f: %s bootstrap [%.4f, %.4f], normal [%.4f, %.4f]", zeroShare, c.name, c.got.Low, c.got.High, c.center-c.half, c.center+c.half)
			if c.half < 1e-9 {
				if math.Abs(c.got.Low-c.center) > 1e-9 || math.Abs(c.got.High-c.center) > 1e-9 {
					t.Errorf("zero share %.2f: %s interval [%v, %v] around a constant %v", zeroShare, c.name, c.got.Low, c.got.High, c.center)
				}
				continue
			}
			if math.Abs(c.got.Low-(c.center-c.half)) > 0.2*c.half || math.Abs(c.got.High-(c.center+c.half)) > 0.2*c.half {
				t.Errorf("zero share %.2f: %s bootstrap interval [%v, %v] far from [%v, %v]", zeroShare, c.name, c.got.Low, c.got.High, c.center-c.half, c.center+c.half)
			}
		}
		// Per-decision returns equal to rho G make the two unbiased
		// estimates one statistic, resampled alike.
		if math.Abs(iv.Ordinary.Low-iv.PerDecision.Low) > 1e-12 || math.Abs(iv.Ordinary.High-iv.PerDecision.High) > 1e-12 {
			t.Errorf("zero share %.2f: ordinary %v and per-decision %v intervals must agree", zeroShare, *iv.Ordinary, *iv.PerDecision)
		}
	}
}

// A resample that draws no episode of positive weight has no weighted
// estimate (0/0, Sutton & Barto, 2nd ed., eq. 5.6) and must not count as
// one. 100 episodes, 3 agreeing with the target (ratio 1, return 10), the
// rest of ratio 0: every informative resample gives 10, and a resample
// misses all three with chance 0.97^100 = 4.8%, more than the 2.5% a 95%
// interval leaves in each tail, so the weighted interval is withheld, with
// a note. With 6 agreeing the chance is 0.94^100 = 0.2% and the interval
// is [10, 10].
func TestBootstrapLeavesOutResamplesWithoutWeight(t *testing.T) {
	const resamples = 4000
	for _, agree := range []int{3, 6} {
		s := training.ISSample{Episodes: make([]training.WeightedReturn, 100)}
		for i := range agree {
			s.Episodes[i] = training.WeightedReturn{Ratio: 1, Return: 10}
		}
		iv, err := training.BootstrapIS(context.Background(), s, resamples, 0.95, rand.New(rand.NewPCG(3, 3)), nil)
		if err != nil {
			t.Fatal(err)
		}
		miss := math.Pow(1-float64(agree)/100, 100)
		// Binomial share of resamples: within 4 standard deviations.
		if tol := 4 * math.Sqrt(miss*(1-miss)/resamples); math.Abs(iv.WeightlessShare-miss) > tol {
			t.Errorf("%d agreeing: weightless share %v, want %v +- %v", agree, iv.WeightlessShare, miss, tol)
		}
		switch {
		case agree == 3 && (iv.Weighted != nil || len(iv.Notes) != 1 || !strings.Contains(iv.Notes[0], "4.")):
			t.Errorf("3 agreeing: weighted interval %v, notes %q; want it withheld with a note giving the share", iv.Weighted, iv.Notes)
		case agree == 6 && (iv.Weighted == nil || *iv.Weighted != training.Interval{Low: 10, High: 10}):
			t.Errorf("6 agreeing: weighted interval %v, want [10, 10]", iv.Weighted)
		}
	}
}

// Ratios are products of many factors and are kept as logarithms. A ratio
// too small for a float64 is not a ratio of 0: 600 steps whose actions the
// target takes with probability 0.25 and the behaviour took with 0.99 give
// rho = (0.25/0.99)^600, about 1e-358. Only a step the target never takes
// makes a ratio 0.
func TestTinyRatioIsNotZero(t *testing.T) {
	table := training.NewQTable([]string{"a", "b"}, 0)
	table.Set("s", 0, 1, 1)
	eps := 0.5
	target := training.NewTargetPolicy(table, training.Explore, &eps, training.DefaultSettings())
	ep := training.EpisodeRecord{}
	for range 600 {
		ep.States = append(ep.States, "s")
		ep.Actions = append(ep.Actions, 1)
		ep.Rewards = append(ep.Rewards, 1)
		ep.Probabilities = append(ep.Probabilities, 0.99)
	}
	r, ok := training.ImportanceRatio(ep, 1, target.Probability)
	if want := 600 * math.Log(0.25/0.99); !ok || math.Abs(r.LogRatio-want) > 1e-9 {
		t.Fatalf("log ratio %v (%v), want %v: an underflow was taken for an action the target never takes", r.LogRatio, ok, want)
	}
	greedy := training.NewTargetPolicy(table, training.Greedy, nil, training.DefaultSettings())
	zero, _ := training.ImportanceRatio(ep, 1, greedy.Probability)
	if !math.IsInf(zero.LogRatio, -1) {
		t.Fatalf("an action the greedy target never takes: log ratio %v, want -Inf", zero.LogRatio)
	}
	// Scaled together, the tiny ratio is the largest and counts fully.
	s := training.NewISSample([]training.EpisodeRatio{zero, {LogRatio: r.LogRatio, Return: 3}})
	if s.Weighted() != 3 || s.EffectiveSampleSize() != 1 {
		t.Fatalf("weighted %v, ESS %v, want 3 and 1", s.Weighted(), s.EffectiveSampleSize())
	}
}

// Per-decision importance sampling (Sutton & Barto, 2nd ed., section 5.9,
// eq. 5.15 from the first step; the equation number from memory) weights
// each reward by the ratio of the actions up to it only. Worked by hand: step ratios 2, 0.5 and 0 (an
// action the target never takes), rewards 1, 3 and 7, gamma 0.5: the
// per-decision return is 2*1 + 0.5*(2*0.5)*3 + 0.25*0*7 = 3.5, the
// ordinary one rho G = 0 * (1 + 1.5 + 1.75).
func TestPerDecisionReturnOnHandWorkedNumbers(t *testing.T) {
	pi := map[string]float64{"x": 1, "y": 0.25, "z": 0}
	ep := training.EpisodeRecord{States: []string{"x", "y", "z"}, Actions: []int16{0, 0, 0}, Rewards: []float64{1, 3, 7}, Probabilities: []float64{0.5, 0.5, 0.5}}
	r, ok := training.ImportanceRatio(ep, 0.5, func(state string, _ training.ActionSet, _ int16) float64 { return pi[state] })
	if !ok || !math.IsInf(r.LogRatio, -1) || r.Return != 4.25 {
		t.Fatalf("ratio %+v %v", r, ok)
	}
	s := training.NewISSample([]training.EpisodeRatio{r})
	if got := s.PerDecision(); math.Abs(got-3.5) > 1e-12 || s.Ordinary() != 0 {
		t.Fatalf("per-decision %v, ordinary %v; want 3.5 and 0", got, s.Ordinary())
	}
}

// Evaluation must evaluate what choose serves: for every state of a table
// and every greedy setting, the target policy's probabilities are the
// probabilities choose reports for its answers, and choose never answers
// an action the target gives 0.
func TestTargetPolicyFollowsTheGreedyRuleOfChoose(t *testing.T) {
	actions := []string{"email", "text", "wait"}
	table := training.NewQTable(actions, 1)
	table.Set("tried-all", 0, -1, 5)
	table.Set("tried-all", 1, -2, 1)
	table.Set("tried-all", 2, -3, 9)
	table.Set("one-tried", 1, -4, 2)
	rows := []training.QRow{}
	for name, s := range table.States {
		for a := range s.Q {
			if s.Visits[a] > 0 {
				rows = append(rows, training.QRow{State: name, Action: int16(a), Q: s.Q[a], Visits: s.Visits[a], Revision: 1})
			}
		}
	}
	for _, tc := range []struct {
		name     string
		settings func(*training.Settings)
	}{
		{"defaults", func(*training.Settings) {}},
		{"untried compete", func(s *training.Settings) { s.GreedyUntried = true }},
		{"fallback after 3 visits", func(s *training.Settings) { s.GreedyMinVisits, s.GreedyFallback = 3, "wait" }},
	} {
		t.Run(tc.name, func(t *testing.T) {
			p := training.Policy{ID: 1, Name: "renewals", Settings: training.DefaultSettings()}
			p.Actions, p.InitialQ, p.Revision = actions, 1, 1
			tc.settings(&p.Settings)
			r := training.NewReplica(staticSource{p, rows})
			for _, mode := range []training.Mode{training.Greedy, training.Explore} {
				target := training.NewTargetPolicy(table, mode, nil, p.Settings)
				// Every action, or email and wait only (a mask of bits 0 and 2).
				for _, mask := range []struct {
					names []string
					set   training.ActionSet
				}{{nil, nil}, {[]string{"email", "wait"}, training.ActionSet{0b101}}} {
					for _, state := range []string{"tried-all", "one-tried", "unseen"} {
						for range 200 {
							c, err := r.Choose(context.Background(), "renewals", training.ChooseRequest{State: state, Mode: mode, Allowed: mask.names})
							if errors.Is(err, training.ErrNoAnswer) {
								for a := range actions {
									if pr := target.Probability(state, mask.set, int16(a)); pr != 0 {
										t.Fatalf("%s %s: choose has no answer, target gives %s %v", mode, state, actions[a], pr)
									}
								}
								break
							}
							if err != nil {
								t.Fatal(err)
							}
							a := slices.Index(actions, c.Action)
							if pr := target.Probability(state, mask.set, int16(a)); math.Abs(pr-c.Probability) > 1e-15 || pr == 0 {
								t.Fatalf("%s %s among %v: choose answered %s with %v, target gives %v", mode, state, mask.names, c.Action, c.Probability, pr)
							}
						}
					}
				}
			}
		})
	}
}

// staticSource serves one policy and its rows.
type staticSource struct {
	p    training.Policy
	rows []training.QRow
}

func (s staticSource) PolicyByName(context.Context, string) (training.Policy, error) { return s.p, nil }
func (s staticSource) PolicyByID(context.Context, int32) (training.Policy, error)    { return s.p, nil }
func (s staticSource) ListPolicies(context.Context) ([]training.Policy, error) {
	return []training.Policy{s.p}, nil
}
func (s staticSource) QRowsSince(_ context.Context, _ int32, _ int64, fn func(training.QRow)) error {
	for _, r := range s.rows {
		fn(r)
	}
	return nil
}
