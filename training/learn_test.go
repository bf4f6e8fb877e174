package training

import (
	"maps"
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/stat"
)

// Sutton & Barto, Reinforcement Learning: An Introduction, 2nd ed.,
// Exercise 3.8: gamma = 0.5, R1..R5 = -1, 2, 6, 3, 2 (T = 5) gives
// G0..G4 = 2, 6, 8, 4, 2.
func TestReturnsMatchBookExercise(t *testing.T) {
	got := Returns([]float64{-1, 2, 6, 3, 2}, 0.5, nil)
	want := []float64{2, 6, 8, 4, 2}
	if !floats.EqualApprox(got, want, 1e-12) {
		t.Fatalf("returns = %v, want %v", got, want)
	}
}

// The return is the discounted sum G_t = sum_k gamma^k R_{t+k+1}
// (same book, eq. 3.8); the backward recursion (eq. 3.9) must agree with it.
func TestReturnsEqualDiscountedSum(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	for range 200 {
		n := 1 + rng.IntN(40)
		gamma := rng.Float64()
		rewards := make([]float64, n)
		for i := range rewards {
			rewards[i] = rng.NormFloat64() * 10
		}
		got := Returns(rewards, gamma, nil)
		for tt := range n {
			sum := 0.0
			for k := tt; k < n; k++ {
				sum += math.Pow(gamma, float64(k-tt)) * rewards[k]
			}
			if math.Abs(got[tt]-sum) > 1e-9*math.Max(1, math.Abs(sum)) {
				t.Fatalf("G_%d = %v, discounted sum = %v", tt, got[tt], sum)
			}
		}
	}
}

// Same book, section 2.5, eq. 2.6: after n constant-step updates,
// Q_{n+1} = (1-alpha)^n Q_1 + sum_i alpha (1-alpha)^(n-i) R_i,
// an exponential recency-weighted average.
func TestConstantStepIsExponentialRecencyWeightedAverage(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	for range 500 {
		n := 1 + rng.IntN(200)
		alpha := 0.001 + 0.999*rng.Float64()
		q1 := rng.NormFloat64() * 5
		q := q1
		targets := make([]float64, n)
		for i := range targets {
			targets[i] = rng.NormFloat64()*3 + 1
			q, _ = ConstantStep(q, targets[i], alpha)
		}
		want := math.Pow(1-alpha, float64(n)) * q1
		for i, r := range targets {
			want += alpha * math.Pow(1-alpha, float64(n-1-i)) * r
		}
		if math.Abs(q-want) > 1e-12*math.Max(1, math.Abs(want)) {
			t.Fatalf("n=%d alpha=%v: incremental %v, eq. 2.6 gives %v", n, alpha, q, want)
		}
	}
}

// With step 1/n the same update is the incremental sample average
// (same book, eq. 2.3), which must equal gonum's stat.Mean.
func TestStepOneOverNGivesSampleMean(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	xs := make([]float64, 1000)
	q := 0.0
	for i := range xs {
		xs[i] = rng.ExpFloat64() * 7
		q, _ = ConstantStep(q, xs[i], 1/float64(i+1))
	}
	if want := stat.Mean(xs, nil); math.Abs(q-want) > 1e-9 {
		t.Fatalf("1/n updates give %v, sample mean %v", q, want)
	}
}

// referenceLearn is a deliberately plain sequential reading of Monte Carlo
// prediction with constant step: returns as explicit discounted sums, a
// linear search for first occurrences, one update at a time. It updates
// table in place and calls updated, when given, after each update.
func referenceLearn(p Policy, table map[PairKey]Estimate, episodes []StoredEpisode, updated func(PairKey, Estimate)) {
	for _, ep := range episodes {
		n := len(ep.States)
		for tt := n - 1; tt >= 0; tt-- {
			k := PairKey{ep.States[tt], ep.Actions[tt]}
			if p.Visit == FirstVisit {
				first := -1
				for j := 0; j < n && first < 0; j++ {
					if ep.States[j] == k.State && ep.Actions[j] == k.Action {
						first = j
					}
				}
				if first != tt {
					continue
				}
			}
			g := 0.0
			for j := n - 1; j >= tt; j-- {
				g = ep.Rewards[j] + p.Gamma*g
			}
			e, ok := table[k]
			if !ok {
				e.Q = p.InitialQ
			}
			e.LastDelta = p.Alpha * (g - e.Q)
			e.Q += e.LastDelta
			e.Visits++
			table[k] = e
			if updated != nil {
				updated(k, e)
			}
		}
	}
}

func randomEpisodes(rng *rand.Rand, count, states, actions int) []StoredEpisode {
	eps := make([]StoredEpisode, count)
	for i := range eps {
		n := 1 + rng.IntN(12)
		rec := EpisodeRecord{States: make([]string, n), Actions: make([]int16, n), Rewards: make([]float64, n)}
		for j := range n {
			rec.States[j] = string(rune('a' + rng.IntN(states)))
			rec.Actions[j] = int16(rng.IntN(actions))
			rec.Rewards[j] = float64(rng.IntN(21) - 10)
		}
		eps[i] = StoredEpisode{Seq: int64(i + 1), EpisodeRecord: rec}
	}
	return eps
}

func TestLearnEqualsSequentialUpdates(t *testing.T) {
	for _, visit := range []VisitRule{FirstVisit, EveryVisit} {
		t.Run(string(visit), func(t *testing.T) {
			rng := rand.New(rand.NewPCG(7, 8))
			p := Policy{Settings: Settings{Actions: []string{"x", "y", "z"}, Gamma: 0.9, Alpha: 0.3, Visit: visit, InitialQ: 0.5}}
			reference := map[PairKey]Estimate{}
			stored := map[PairKey]Estimate{}
			for batch := range 20 {
				episodes := randomEpisodes(rng, 1+rng.IntN(30), 4, 3)
				referenceLearn(p, reference, episodes, nil)
				current := map[PairKey]Estimate{}
				for _, s := range TouchedStates(episodes) {
					for a := range 3 {
						k := PairKey{s, int16(a)}
						if e, ok := stored[k]; ok {
							current[k] = e
						}
					}
				}
				res := Learn(BatchInput{Policy: p, Episodes: episodes, Current: current})
				for _, pr := range res.Pairs {
					stored[pr.PairKey] = pr.Estimate
				}
				if len(stored) != len(reference) {
					t.Fatalf("batch %d: %d pairs, reference has %d", batch, len(stored), len(reference))
				}
				for k, want := range reference {
					if got := stored[k]; math.Abs(got.Q-want.Q) > 1e-12 || got.Visits != want.Visits || math.Abs(got.LastDelta-want.LastDelta) > 1e-12 {
						t.Fatalf("batch %d, pair %v: got %+v, reference %+v", batch, k, got, want)
					}
				}
			}
		})
	}
}

func TestFirstVisitUpdatesOnlyTheEarliestOccurrence(t *testing.T) {
	// One episode visits (s, a) at steps 0 and 2; rewards 1, 0, 10, gamma 1.
	// Returns: G0 = 11, G1 = 10, G2 = 10. First visit uses G0 only; every
	// visit applies G2 and then G0.
	ep := StoredEpisode{EpisodeRecord: EpisodeRecord{
		States: []string{"s", "t", "s"}, Actions: []int16{0, 1, 0}, Rewards: []float64{1, 0, 10}}}
	p := Policy{Settings: Settings{Actions: []string{"a", "b"}, Gamma: 1, Alpha: 0.5, Visit: FirstVisit}}
	res := Learn(BatchInput{Policy: p, Episodes: []StoredEpisode{ep}})
	got := pairsByKey(res)
	if e := got[PairKey{"s", 0}]; e.Q != 5.5 || e.Visits != 1 {
		t.Fatalf("first visit: %+v, want Q 5.5 after one update", e)
	}
	p.Visit = EveryVisit
	res = Learn(BatchInput{Policy: p, Episodes: []StoredEpisode{ep}})
	got = pairsByKey(res)
	// 0 -> 0 + 0.5 (10 - 0) = 5 -> 5 + 0.5 (11 - 5) = 8.
	if e := got[PairKey{"s", 0}]; e.Q != 8 || e.Visits != 2 || e.LastDelta != 3 {
		t.Fatalf("every visit: %+v, want Q 8, 2 visits, last delta 3", e)
	}
	if res.EpisodeReturns[0] != 11 || res.Steps != 3 {
		t.Fatalf("returns %v steps %d", res.EpisodeReturns, res.Steps)
	}
}

func TestGreedyChangesCountStatesWhoseArgmaxMoved(t *testing.T) {
	p := Policy{Settings: Settings{Actions: []string{"a", "b"}, Gamma: 1, Alpha: 1, Visit: EveryVisit}}
	current := map[PairKey]Estimate{{"s", 0}: {Q: 5, Visits: 1}, {"t", 0}: {Q: 5, Visits: 1}}
	eps := []StoredEpisode{
		{EpisodeRecord: EpisodeRecord{States: []string{"s"}, Actions: []int16{1}, Rewards: []float64{9}}}, // b overtakes a in s
		{EpisodeRecord: EpisodeRecord{States: []string{"t"}, Actions: []int16{1}, Rewards: []float64{1}}}, // a stays greedy in t
	}
	res := Learn(BatchInput{Policy: p, Episodes: eps, Current: current})
	if res.GreedyChanges != 1 {
		t.Fatalf("greedy changes = %d, want 1", res.GreedyChanges)
	}
}

func pairsByKey(res BatchResult) map[PairKey]Estimate {
	m := map[PairKey]Estimate{}
	for _, pr := range res.Pairs {
		m[pr.PairKey] = pr.Estimate
	}
	return m
}

// referenceBatch computes everything Learn reports the plain way, one
// update at a time on a map: the order pairs were first updated, every
// |delta Q|, each episode's G0, and the states whose set of greedy actions
// (over the policy's actions, unseen pairs at the initial value) differs
// between the table before and after.
func referenceBatch(p Policy, current map[PairKey]Estimate, episodes []StoredEpisode) (order []PairKey, deltas, returns []float64, greedyChanges int) {
	table := maps.Clone(current)
	seen := map[PairKey]bool{}
	referenceLearn(p, table, episodes, func(k PairKey, e Estimate) {
		deltas = append(deltas, math.Abs(e.LastDelta))
		if !seen[k] {
			seen[k] = true
			order = append(order, k)
		}
	})
	for _, ep := range episodes {
		g := 0.0
		for j := len(ep.Rewards) - 1; j >= 0; j-- {
			g = ep.Rewards[j] + p.Gamma*g
		}
		returns = append(returns, g)
	}
	greedy := func(t map[PairKey]Estimate, s string) []bool {
		q := make([]float64, len(p.Actions))
		for a := range q {
			q[a] = p.InitialQ
			if e, ok := t[PairKey{s, int16(a)}]; ok {
				q[a] = e.Q
			}
		}
		top := slices.Max(q)
		set := make([]bool, len(q))
		for a := range q {
			set[a] = q[a] == top
		}
		return set
	}
	counted := map[string]bool{}
	for _, k := range order {
		if !counted[k.State] {
			counted[k.State] = true
			if !slices.Equal(greedy(current, k.State), greedy(table, k.State)) {
				greedyChanges++
			}
		}
	}
	return order, deltas, returns, greedyChanges
}

// Everything a batch reports, not only the final estimates, matches the
// plain computation, including which states changed their greedy actions.
func TestLearnReportsWhatSequentialUpdatesDo(t *testing.T) {
	for _, visit := range []VisitRule{FirstVisit, EveryVisit} {
		t.Run(string(visit), func(t *testing.T) {
			rng := rand.New(rand.NewPCG(9, 10))
			p := Policy{Settings: Settings{Actions: []string{"x", "y", "z"}, Gamma: 0.8, Alpha: 0.5, Visit: visit, InitialQ: 0.25}}
			for batch := range 50 {
				episodes := randomEpisodes(rng, 1+rng.IntN(20), 6, 3)
				current := map[PairKey]Estimate{}
				for range rng.IntN(12) {
					// Integer values make ties, so greedy sets change both ways.
					k := PairKey{string(rune('a' + rng.IntN(8))), int16(rng.IntN(3))}
					current[k] = Estimate{Q: float64(rng.IntN(5)), Visits: 1 + rng.Int64N(9), LastDelta: rng.NormFloat64()}
				}
				order, deltas, returns, changes := referenceBatch(p, current, episodes)
				res := Learn(BatchInput{Policy: p, Episodes: episodes, Current: current})
				got := make([]PairKey, len(res.Pairs))
				for i, pr := range res.Pairs {
					got[i] = pr.PairKey
				}
				if !slices.Equal(got, order) {
					t.Fatalf("batch %d: pairs in order %v, reference %v", batch, got, order)
				}
				if !floats.EqualApprox(res.AbsDeltas, deltas, 1e-12) || !floats.EqualApprox(res.EpisodeReturns, returns, 1e-12) {
					t.Fatalf("batch %d: deltas %v returns %v, reference %v %v", batch, res.AbsDeltas, res.EpisodeReturns, deltas, returns)
				}
				if res.GreedyChanges != changes {
					t.Fatalf("batch %d: %d greedy changes, reference %d", batch, res.GreedyChanges, changes)
				}
			}
		})
	}
}
