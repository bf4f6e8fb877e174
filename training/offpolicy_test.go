package training_test

import (
	"context"
	"errors"
	"math"
	"math/rand/v2"
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

func weightedReturns(t *testing.T, target *training.TargetPolicy, rng *rand.Rand, n int) []training.WeightedReturn {
	t.Helper()
	out := make([]training.WeightedReturn, n)
	for i := range out {
		ep := behaviourEpisode(rng)
		rho, ok := training.ImportanceRatio(ep, target.Probability)
		if !ok {
			t.Fatal("an episode with every probability was refused")
		}
		out[i] = training.WeightedReturn{Ratio: rho, Return: training.Returns(ep.Rewards, 1, nil)[0]}
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
		s := weightedReturns(t, target, rng, episodes)
		for i, n := range checkpoints {
			ord, wtd := training.OrdinaryIS(s[:n]), training.WeightedIS(s[:n])
			mseOrd[i] += (ord - cardgame.ExampleStartValue) * (ord - cardgame.ExampleStartValue) / runs
			mseWtd[i] += (wtd - cardgame.ExampleStartValue) * (wtd - cardgame.ExampleStartValue) / runs
		}
		final["ordinary"] = append(final["ordinary"], training.OrdinaryIS(s))
		final["weighted"] = append(final["weighted"], training.WeightedIS(s))
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
	s := []training.WeightedReturn{{Ratio: 2, Return: 1}, {Ratio: 0, Return: 5}, {Ratio: 4, Return: -1}}
	for name, c := range map[string][2]float64{
		"ordinary": {training.OrdinaryIS(s), -2.0 / 3},
		"weighted": {training.WeightedIS(s), -1.0 / 3},
		"ESS":      {training.EffectiveSampleSize(s), 1.8},
	} {
		if math.Abs(c[0]-c[1]) > 1e-12 {
			t.Errorf("%s = %v, want %v", name, c[0], c[1])
		}
	}
	// All ratios zero: the weighted estimate is 0 by the book's convention
	// (eq. 5.6), and the weights are worth no episode at all.
	zero := []training.WeightedReturn{{Ratio: 0, Return: 3}}
	if training.WeightedIS(zero) != 0 || training.EffectiveSampleSize(zero) != 0 {
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
	if p := []float64{greedy.Probability("tied", 0), greedy.Probability("tied", 1), greedy.Probability("tied", 2)}; p[0] != 0.5 || p[1] != 0.5 || p[2] != 0 {
		t.Fatalf("greedy with a tie: %v, want [0.5 0.5 0]", p)
	}
	// In an unknown state no action is tried: greedy has no answer, so the
	// target takes none of them; with untried actions allowed to be greedy
	// every action ties at the initial value.
	if p := greedy.Probability("unseen", 1); p != 0 {
		t.Fatalf("unseen state: %v, want 0", p)
	}
	untried := training.DefaultSettings()
	untried.GreedyUntried = true
	if p := training.NewTargetPolicy(table, training.Greedy, nil, untried).Probability("unseen", 1); math.Abs(p-1.0/3) > 1e-15 {
		t.Fatalf("unseen state, untried actions allowed: %v, want 1/3", p)
	}
	eps := 0.3
	soft := training.NewTargetPolicy(table, training.Explore, &eps, training.DefaultSettings())
	if p := soft.Probability("one", 2); math.Abs(p-(0.7+0.1)) > 1e-15 {
		t.Fatalf("epsilon-soft greedy action: %v, want 0.8", p)
	}
	if p := soft.Probability("one", 0); math.Abs(p-0.1) > 1e-15 {
		t.Fatalf("epsilon-soft other action: %v, want 0.1", p)
	}
	// Without a fixed rate, the policy's own decayed rate for the state's
	// visits applies: 0.4 * 10 / (10 + 30) = 0.1.
	decayed := training.NewTargetPolicy(table, training.Explore, nil, training.Settings{Epsilon: 0.4, EpsilonDecayVisits: 10})
	if p := decayed.Probability("one", 0); math.Abs(p-0.1/3) > 1e-15 {
		t.Fatalf("decayed epsilon-soft: %v, want 0.1/3", p)
	}

	ep := training.EpisodeRecord{States: []string{"tied", "one"}, Actions: []int16{1, 2}, Rewards: []float64{0, 1}, Probabilities: []float64{0.25, 0.5}}
	if rho, ok := training.ImportanceRatio(ep, greedy.Probability); !ok || math.Abs(rho-(0.5/0.25)*(1/0.5)) > 1e-15 {
		t.Fatalf("ratio %v %v, want 4", rho, ok)
	}
	ep.Probabilities[1] = 0
	if _, ok := training.ImportanceRatio(ep, greedy.Probability); ok {
		t.Fatal("a step without a behaviour probability must leave the episode out")
	}
	ep.Probabilities = nil
	if _, ok := training.ImportanceRatio(ep, greedy.Probability); ok {
		t.Fatal("an episode without probabilities must be left out")
	}
}

// The percentile bootstrap intervals must be close to the large-sample
// normal intervals estimate +- z(0.975) se (z from gonum's normal
// quantile): for the ordinary estimate, a mean, se = sd(rho G)/sqrt(n)
// (central limit theorem); for the weighted estimate, a ratio of means, the
// delta-method se = sqrt(sum rho^2 (G - w)^2) / sum rho (common practice
// for self-normalised weights). Once with every ratio 1, where both
// estimates are the sample mean, and once with most ratios 0, the case the
// bootstrap's shortcut for zero weights serves. Seeded, so repeatable.
func TestBootstrapIntervalsAgreeWithNormalTheory(t *testing.T) {
	for _, zeroShare := range []float64{0, 0.85} {
		rng := rand.New(rand.NewPCG(8, 9))
		const n = 4000
		s := make([]training.WeightedReturn, n)
		for i := range s {
			s[i] = training.WeightedReturn{Ratio: 1, Return: rng.ExpFloat64()*2 - 1}
			if zeroShare > 0 {
				s[i].Ratio = 0
				if rng.Float64() >= zeroShare {
					s[i].Ratio = float64(2 + rng.IntN(6))
				}
			}
		}
		ord, wtd, err := training.BootstrapIS(context.Background(), s, 2000, 0.95, rand.New(rand.NewPCG(1, 2)), nil)
		if err != nil {
			t.Fatal(err)
		}
		z := distuv.UnitNormal.Quantile(0.975)
		products := make([]float64, n)
		w := training.WeightedIS(s)
		sumRho, sumSq := 0.0, 0.0
		for i, x := range s {
			products[i] = x.Ratio * x.Return
			sumRho += x.Ratio
			sumSq += x.Ratio * x.Ratio * (x.Return - w) * (x.Return - w)
		}
		ordHalf := z * stat.StdDev(products, nil) / math.Sqrt(n)
		wtdHalf := z * math.Sqrt(sumSq) / sumRho
		o := training.OrdinaryIS(s)
		t.Logf("zero share %.2f: ordinary bootstrap [%.4f, %.4f], normal [%.4f, %.4f]; weighted bootstrap [%.4f, %.4f], delta method [%.4f, %.4f]",
			zeroShare, ord.Low, ord.High, o-ordHalf, o+ordHalf, wtd.Low, wtd.High, w-wtdHalf, w+wtdHalf)
		for _, c := range []struct {
			name         string
			got          training.Interval
			center, half float64
		}{{"ordinary", ord, o, ordHalf}, {"weighted", wtd, w, wtdHalf}} {
			if math.Abs(c.got.Low-(c.center-c.half)) > 0.15*c.half || math.Abs(c.got.High-(c.center+c.half)) > 0.15*c.half {
				t.Errorf("zero share %.2f: %s bootstrap interval [%v, %v] far from [%v, %v]", zeroShare, c.name, c.got.Low, c.got.High, c.center-c.half, c.center+c.half)
			}
		}
		if zeroShare == 0 && ord != wtd {
			t.Errorf("with unit ratios the intervals must agree: %v vs %v", ord, wtd)
		}
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
				for _, state := range []string{"tried-all", "one-tried", "unseen"} {
					for range 200 {
						c, err := r.Choose(context.Background(), "renewals", training.ChooseRequest{State: state, Mode: mode})
						if errors.Is(err, training.ErrNoAnswer) {
							for a := range actions {
								if pr := target.Probability(state, int16(a)); pr != 0 {
									t.Fatalf("%s %s: choose has no answer, target gives %s %v", mode, state, actions[a], pr)
								}
							}
							break
						}
						if err != nil {
							t.Fatal(err)
						}
						a := slices.Index(actions, c.Action)
						if pr := target.Probability(state, int16(a)); math.Abs(pr-c.Probability) > 1e-15 || pr == 0 {
							t.Fatalf("%s %s: choose answered %s with %v, target gives %v", mode, state, c.Action, c.Probability, pr)
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
