package training

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

func setOf(n int, actions ...int16) ActionSet {
	s := make(ActionSet, ActionSetWidth(n))
	for _, a := range actions {
		s.add(a)
	}
	return s
}

// Choosing among an allowed set, as the replica does (the allowed actions'
// values handed to Choose), must pick each action with the probability
// ProbabilitiesAmong gives it, which evaluation uses as the target's. The
// rule is the epsilon-soft one of Sutton & Barto, Reinforcement Learning:
// An Introduction, 2nd ed., section 5.4, over the allowed actions: each of
// the g greedy allowed actions (1-epsilon)/g + epsilon/|allowed|, every
// other allowed action epsilon/|allowed|, and 0 outside the set. Checked
// draw by draw against the probability Choose reports, and in frequency by
// a chi-square goodness-of-fit test at the 1% level (a common-practice
// level); seeded, so repeatable.
func TestProbabilitiesAmongMatchChoosingAmongTheAllowedActions(t *testing.T) {
	cases := []struct {
		name    string
		q       []float64
		allowed []int16
		mode    Mode
		epsilon float64
	}{
		{"masked action holds the top value", []float64{1, 0, 10}, []int16{0, 1}, Explore, 0.3},
		{"greedy, masked top value", []float64{1, 0, 10}, []int16{0, 1}, Greedy, 0.3},
		{"ties inside and outside the set", []float64{5, 5, 5, 1, 0}, []int16{1, 2, 3}, Explore, 0.2},
		{"one allowed action", []float64{3, 1, 2}, []int16{1}, Explore, 0.5},
		{"actions past the first byte", []float64{0, 0, 0, 0, 0, 0, 0, 0, 0, 4, 2, 4}, []int16{9, 10, 11, 3}, Explore, 0.4},
		{"all allowed", []float64{2, 1, 2}, []int16{0, 1, 2}, Explore, 0.1},
	}
	rng := rand.New(rand.NewPCG(17, 19))
	const draws = 100_000
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			want := ProbabilitiesAmong(tc.q, nil, setOf(len(tc.q), tc.allowed...), GreedyRule{Untried: true}, -1, tc.mode, tc.epsilon)
			sum := 0.0
			for a, p := range want {
				sum += p
				if p != 0 && !setOf(len(tc.q), tc.allowed...).Has(int16(a)) {
					t.Fatalf("action %d is outside the set but has probability %v", a, p)
				}
			}
			if math.Abs(sum-1) > 1e-12 {
				t.Fatalf("probabilities %v sum to %v", want, sum)
			}
			among := make([]float64, len(tc.allowed))
			for i, a := range tc.allowed {
				among[i] = tc.q[a]
			}
			counts := make([]float64, len(tc.q))
			for range draws {
				c := Choose(among, tc.mode, tc.epsilon, rng)
				a := tc.allowed[c.Action]
				if c.Probability != want[a] {
					t.Fatalf("Choose reported %v for action %d, ProbabilitiesAmong gives %v", c.Probability, a, want[a])
				}
				counts[a]++
			}
			chi2, df := 0.0, -1
			for a := range tc.q {
				expected := want[a] * draws
				if expected == 0 {
					if counts[a] != 0 {
						t.Fatalf("action %d has probability 0 but was chosen %v times", a, counts[a])
					}
					continue
				}
				chi2 += (counts[a] - expected) * (counts[a] - expected) / expected
				df++
			}
			if df < 1 {
				return
			}
			if critical := (distuv.ChiSquared{K: float64(df)}).Quantile(0.99); chi2 > critical {
				t.Fatalf("chi-square %.2f > %.2f (df %d): counts %v, probabilities %v", chi2, critical, df, counts, want)
			}
		})
	}
}

// Without a set, ProbabilitiesAmong is ActionProbability over every action,
// what evaluation has always used for steps posted without one.
func TestProbabilitiesAmongWithoutASetIsTheWholePolicy(t *testing.T) {
	q := []float64{1, 3, 3, 0}
	for _, mode := range []Mode{Explore, Greedy} {
		got := ProbabilitiesAmong(q, nil, nil, GreedyRule{Untried: true}, -1, mode, 0.2)
		for a, v := range q {
			if want := ActionProbability(mode, 0.2, len(q), 2, v == 3); got[a] != want {
				t.Errorf("%s: action %d has %v, want %v", mode, a, got[a], want)
			}
		}
	}
}

// The target reads each step's set: with Q(a) = 1, Q(b) = 0, Q(c) = 0,
// epsilon 0.3 and c masked, pi(a) = 0.7 + 0.3/2 = 0.85 and pi(b) = 0.15
// (the epsilon-soft rule over the two allowed actions, Sutton & Barto, 2nd
// ed., section 5.4); without the set 0.8 and 0.1. A greedy target whose
// unseen masked action holds the top initial value still takes a.
func TestTargetProbabilitiesFollowEachStepsAllowedSet(t *testing.T) {
	table := NewQTable([]string{"a", "b", "c"}, 0)
	table.Set("s", 0, 1, 5)
	table.Set("s", 1, 0, 5)
	eps := 0.3
	soft := NewTargetPolicy(table, Explore, &eps, DefaultSettings())
	ab := setOf(3, 0, 1)
	for _, c := range []struct {
		allowed ActionSet
		action  int16
		want    float64
	}{{ab, 0, 0.85}, {ab, 1, 0.15}, {ab, 2, 0}, {nil, 0, 0.8}, {nil, 1, 0.1}, {ab, 0, 0.85}} {
		if got := soft.Probability("s", c.allowed, c.action); math.Abs(got-c.want) > 1e-15 {
			t.Errorf("pi(%d | s, allowed %v) = %v, want %v", c.action, c.allowed, got, c.want)
		}
	}
	optimistic := NewQTable([]string{"a", "b", "c"}, 10)
	optimistic.Set("s", 0, 1, 5)
	optimistic.Set("s", 1, 0, 5)
	// Untried actions may be greedy here, at the initial value, so that
	// only the mask keeps c out.
	untried := DefaultSettings()
	untried.GreedyUntried = true
	greedy := NewTargetPolicy(optimistic, Greedy, nil, untried)
	if got := greedy.Probability("s", ab, 0); got != 1 {
		t.Errorf("greedy among {a, b} takes a with %v, want 1", got)
	}
	if got := greedy.Probability("s", nil, 0); got != 0 {
		t.Errorf("greedy among every action takes a with %v, want 0 (c's initial value is the top)", got)
	}

	// ImportanceRatio hands each step its own set.
	ep := EpisodeRecord{States: []string{"s", "s"}, Actions: []int16{0, 1}, Rewards: []float64{0, 1},
		Probabilities: []float64{0.5, 0.5}, Allowed: []byte{0b011, 0}}
	r, ok := ImportanceRatio(ep, 1, soft.Probability)
	rho := math.Exp(r.LogRatio)
	if want := (0.85 / 0.5) * (0.1 / 0.5); !ok || math.Abs(rho-want) > 1e-14 {
		t.Errorf("ratio %v, %v; want %v from step 0 under {a, b} and step 1 unmasked", rho, ok, want)
	}
	if n := ep.StepsWithoutAllowed(); n != 1 {
		t.Errorf("steps without a set: %d, want 1", n)
	}
}

// ValidateAndEncodeEpisodes stores a step's set as bits over action indexes, width
// ceil(actions / 8) bytes a step, all zero for a step without a set, and
// nothing at all for an episode without any.
func TestAllowedSetsAreStoredAsBitsPerStep(t *testing.T) {
	actions := make([]string, 12)
	for i := range actions {
		actions[i] = string(rune('a' + i))
	}
	p := Settings{Actions: actions}
	eps := []Episode{
		{ID: "masked", Steps: []Step{{State: "s", Action: "j", Allowed: []string{"j", "a"}}, {State: "s", Action: "b"}, {State: "s", Action: "l", Allowed: []string{"l"}}}},
		{ID: "plain", Steps: []Step{{State: "s", Action: "b"}}},
	}
	recs, err := ValidateAndEncodeEpisodes(p, eps, DefaultLimits())
	if err != nil {
		t.Fatal(err)
	}
	// j is action 9 (byte 1, bit 1), a is 0, l is 11 (byte 1, bit 3).
	want := []byte{0b1, 0b10, 0, 0, 0, 0b1000}
	if got := recs[0].Allowed; string(got) != string(want) {
		t.Errorf("stored sets %08b, want %08b", got, want)
	}
	if recs[1].Allowed != nil {
		t.Errorf("an episode without sets stored %v, want nil", recs[1].Allowed)
	}
	if s := recs[0].AllowedAt(1); s != nil {
		t.Errorf("a step without a set reads back as %v", s)
	}
	if s := recs[0].AllowedAt(0); !s.Has(9) || !s.Has(0) || s.Has(1) || s.Has(11) {
		t.Errorf("step 0 reads back as %08b", s)
	}
}
