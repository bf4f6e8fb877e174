package training

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

// Sutton & Barto, Reinforcement Learning: An Introduction, 2nd ed., section
// 5.4 (on-policy first-visit MC control for epsilon-soft policies): every
// greedy action has probability 1 - epsilon + epsilon/|A| (split among g tied
// greedy actions: (1-epsilon)/g + epsilon/|A|), every other epsilon/|A|.
// Sampled frequencies must fit these by a chi-square goodness-of-fit test at
// the 1% level (the level is common practice). The generator is seeded so
// the test is repeatable.
func TestExploreFrequenciesMatchEpsilonSoftProbabilities(t *testing.T) {
	cases := []struct {
		name    string
		q       []float64
		epsilon float64
	}{
		{"one greedy", []float64{1, 3, 2, 0}, 0.2},
		{"two tied", []float64{3, 1, 3, 0, -1}, 0.3},
		{"unseen state, all tied", []float64{0, 0, 0}, 0.1},
		{"no exploration", []float64{1, 2}, 0},
		{"all exploration", []float64{5, 1, 1}, 1},
	}
	rng := rand.New(rand.NewPCG(11, 12))
	const draws = 200_000
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			n := len(tc.q)
			top, ties := tc.q[0], 0
			for _, v := range tc.q {
				top = math.Max(top, v)
			}
			for _, v := range tc.q {
				if v == top {
					ties++
				}
			}
			want := make([]float64, n)
			for i, v := range tc.q {
				want[i] = ActionProbability(Explore, tc.epsilon, n, ties, v == top)
			}
			counts := make([]float64, n)
			for range draws {
				c := Choose(tc.q, Explore, tc.epsilon, rng)
				if c.Probability != want[c.Action] {
					t.Fatalf("reported probability %v for action %d, rule gives %v", c.Probability, c.Action, want[c.Action])
				}
				if c.Explored != (tc.q[c.Action] != top) || tc.q[c.Greedy] != top {
					t.Fatalf("choice %+v mislabels greedy/explored for q %v", c, tc.q)
				}
				counts[c.Action]++
			}
			chi2, df := 0.0, -1
			for i := range n {
				expected := want[i] * draws
				if expected == 0 {
					if counts[i] != 0 {
						t.Fatalf("action %d has probability 0 but was chosen %v times", i, counts[i])
					}
					continue
				}
				chi2 += (counts[i] - expected) * (counts[i] - expected) / expected
				df++
			}
			if df < 1 {
				return // a single possible action: checked exactly above
			}
			critical := distuv.ChiSquared{K: float64(df)}.Quantile(0.99)
			if chi2 > critical {
				t.Fatalf("chi-square %.2f > %.2f (df %d): counts %v, probabilities %v", chi2, critical, df, counts, want)
			}
		})
	}
}

func TestGreedyModeNeverExplores(t *testing.T) {
	rng := rand.New(rand.NewPCG(13, 14))
	q := []float64{2, 7, 7, 1}
	seen := map[int]int{}
	for range 10_000 {
		c := Choose(q, Greedy, 0.5, rng)
		if c.Explored || c.Probability != 0.5 || (c.Action != 1 && c.Action != 2) {
			t.Fatalf("greedy choice %+v", c)
		}
		seen[c.Action]++
	}
	if seen[1] < 4500 || seen[2] < 4500 {
		t.Fatalf("ties not split evenly: %v", seen)
	}
}

func TestEpsilonDecaysWithStateVisits(t *testing.T) {
	s := Settings{Epsilon: 0.4, EpsilonMin: 0.05, EpsilonDecayVisits: 10}
	for _, tc := range []struct {
		n    int64
		want float64
	}{{0, 0.4}, {10, 0.2}, {30, 0.1}, {1000, 0.05}} {
		if got := s.EpsilonFor(tc.n); math.Abs(got-tc.want) > 1e-15 {
			t.Errorf("epsilon(N=%d) = %v, want %v", tc.n, got, tc.want)
		}
	}
	s.EpsilonDecayVisits = 0
	if got := s.EpsilonFor(1000); got != 0.4 {
		t.Errorf("decay off: epsilon = %v, want 0.4", got)
	}
}
