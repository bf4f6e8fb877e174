package training_test

import (
	"context"
	"flag"
	"fmt"
	"math/rand/v2"
	"testing"

	"github.com/qtally/qtally/training"
)

// The support desk: a small episodic model of our own whose values are
// computed exactly, to measure how often the evaluation's intervals cover
// the truth. A ticket is answered up to four times; the customer is calm
// or upset. Each contact is a reply (free), a call (costs 1) or a refund
// (costs 2 and closes the ticket). A reply or a call solves the problem
// with a chance that depends on the mood (reward 4); otherwise the mood
// may sour, and an unsolved fourth contact loses the customer (reward -5).
const (
	deskContacts = 4
	deskGamma    = 0.9
	deskReply    = 0
	deskCall     = 1
	deskRefund   = 2
)

// deskSolves[action][upset] and deskSours[action][upset] are the chances
// that a contact solves the problem and, if not, that the customer is
// upset afterwards.
var (
	deskSolves = [2][2]float64{{0.5, 0.2}, {0.7, 0.45}}
	deskSours  = [2][2]float64{{0.4, 0.8}, {0.2, 0.5}}
)

func deskState(contact int, upset bool) string {
	mood := "calm"
	if upset {
		mood = "upset"
	}
	return fmt.Sprintf("contact=%d|mood=%s", contact, mood)
}

// deskPolicy gives pi(a | contact, upset).
type deskPolicy func(contact int, upset bool) [3]float64

// deskBehaviour is how the desk works today: mostly replies, some calls,
// an occasional refund, more calls once the customer is upset.
func deskBehaviour(contact int, upset bool) [3]float64 {
	if upset {
		return [3]float64{0.4, 0.45, 0.15}
	}
	return [3]float64{0.6, 0.3, 0.1}
}

// deskTarget is a candidate rule: call an upset customer, reply to a calm
// one, refund on the last contact if still upset; epsilon spread evenly.
func deskTarget(epsilon float64) deskPolicy {
	return func(contact int, upset bool) [3]float64 {
		greedy := deskReply
		switch {
		case upset && contact == deskContacts-1:
			greedy = deskRefund
		case upset:
			greedy = deskCall
		}
		p := [3]float64{epsilon / 3, epsilon / 3, epsilon / 3}
		p[greedy] += 1 - epsilon
		return p
	}
}

// deskValue is the exact expected discounted return from the first
// contact with a calm customer, by dynamic programming backwards over the
// contacts (Bellman expectation equation, Sutton & Barto, 2nd ed., eq. 3.14;
// the equation number from memory).
func deskValue(pi deskPolicy) float64 {
	var next [2]float64 // V(contact+1, calm/upset); none after the last
	for c := deskContacts - 1; c >= 0; c-- {
		var v [2]float64
		for m, upset := range []bool{false, true} {
			probs := pi(c, upset)
			for a, p := range probs {
				var q float64
				if a == deskRefund {
					q = -2
				} else {
					solve, sour := deskSolves[a][m], deskSours[a][m]
					cost := 0.0
					if a == deskCall {
						cost = -1
					}
					fail := -5.0
					if c < deskContacts-1 {
						fail = deskGamma * (sour*next[1] + (1-sour)*next[0])
					}
					q = cost + solve*4 + (1-solve)*fail
				}
				v[m] += p * q
			}
		}
		next = v
	}
	return next[0]
}

// deskEpisode plays one ticket under the behaviour and records it with
// the behaviour's probabilities, as an application posts it.
func deskEpisode(rng *rand.Rand) training.EpisodeRecord {
	var ep training.EpisodeRecord
	upset := false
	for c := range deskContacts {
		probs := deskBehaviour(c, upset)
		u, a := rng.Float64(), 0
		for a < 2 && u >= probs[a] {
			u -= probs[a]
			a++
		}
		ep.States = append(ep.States, deskState(c, upset))
		ep.Actions = append(ep.Actions, int16(a))
		ep.Probabilities = append(ep.Probabilities, probs[a])
		m := 0
		if upset {
			m = 1
		}
		if a == deskRefund {
			ep.Rewards = append(ep.Rewards, -2)
			return ep
		}
		cost := 0.0
		if a == deskCall {
			cost = -1
		}
		if rng.Float64() < deskSolves[a][m] {
			ep.Rewards = append(ep.Rewards, cost+4)
			return ep
		}
		if c == deskContacts-1 {
			ep.Rewards = append(ep.Rewards, cost-5)
			return ep
		}
		ep.Rewards = append(ep.Rewards, cost)
		upset = rng.Float64() < deskSours[a][m]
	}
	return ep
}

func (pi deskPolicy) probability(state string, _ training.ActionSet, action int16) float64 {
	var c int
	var mood string
	if _, err := fmt.Sscanf(state, "contact=%d|mood=%s", &c, &mood); err != nil {
		panic(err)
	}
	return pi(c, mood == "upset")[action]
}

// deskCoverage runs seeded evaluations of the target on fresh behaviour
// episodes and counts, per interval, how often it covers the exact value,
// how often it was withheld, and how often it lay wholly above the value.
func deskCoverage(t *testing.T, target deskPolicy, runs, episodes, resamples int) map[string][3]int {
	t.Helper()
	truth := deskValue(target)
	behaviour := deskValue(deskBehaviour)
	covered := map[string][3]int{}
	count := func(name string, iv *training.Interval, value float64) {
		c := covered[name]
		switch {
		case iv == nil:
			c[1]++
		case iv.Low <= value && value <= iv.High:
			c[0]++
		case iv.Low > value:
			c[2]++
		}
		covered[name] = c
	}
	for run := range runs {
		rng := rand.New(rand.NewPCG(uint64(run), 7))
		ratios := make([]training.EpisodeRatio, episodes)
		for i := range ratios {
			r, ok := training.ImportanceRatio(deskEpisode(rng), deskGamma, target.probability)
			if !ok {
				t.Fatal("an episode with every probability was refused")
			}
			ratios[i] = r
		}
		iv, err := training.BootstrapIS(context.Background(), training.NewISSample(ratios), resamples, training.IntervalLevel, rand.New(rand.NewPCG(uint64(run), 11)), nil)
		if err != nil {
			t.Fatal(err)
		}
		count("ordinary", iv.Ordinary, truth)
		count("weighted", iv.Weighted, truth)
		count("per-decision", iv.PerDecision, truth)
		count("difference", iv.Difference, truth-behaviour)
		count("mean ratio", iv.MeanRatio, 1)
	}
	return covered
}

// coverageRuns can be raised for a more precise measurement:
// go test -run TestIntervalCoverage -v ./training/ -args -coverage-runs=1000
var coverageRuns = flag.Int("coverage-runs", 200, "evaluations per target in TestIntervalCoverage")

// Every interval the evaluation calls 95% must cover the exact value in at
// least 90% of 200 seeded evaluations of 1,000 episodes each (a run with
// the interval left out counts as a miss). The exact values come from
// deskValue; the mean ratio's is 1, because the behaviour can take every
// action (Sutton & Barto, 2nd ed., section 5.5: E_b[rho] = 1). Two
// targets: the candidate rule itself, deterministic, whose ratios are 0 or
// up to 1/(0.6 * 0.45^2 * 0.15), heavy-tailed; and its epsilon-soft
// version (epsilon 0.1). The figures are in docs/evaluation.md.
func TestIntervalCoverage(t *testing.T) {
	runs, episodes := *coverageRuns, 1000
	for _, epsilon := range []float64{0, 0.1} {
		t.Run(fmt.Sprintf("epsilon=%v", epsilon), func(t *testing.T) {
			t.Parallel()
			covered := deskCoverage(t, deskTarget(epsilon), runs, episodes, training.DefaultResamples)
			t.Logf("target value %.5f, behaviour %.5f", deskValue(deskTarget(epsilon)), deskValue(deskBehaviour))
			for _, name := range []string{"ordinary", "weighted", "per-decision", "difference", "mean ratio"} {
				c := covered[name]
				share := float64(c[0]) / float64(runs)
				t.Logf("%-13s covers %5.1f%% (left out %d, wholly above the value %d, below %d, of %d)", name, 100*share, c[1], c[2], runs-c[0]-c[1]-c[2], runs)
				if share < 0.90 {
					t.Errorf("%s: the 95%% interval covers the exact value in %.1f%% of runs, want at least 90%%", name, 100*share)
				}
			}
		})
	}
}
