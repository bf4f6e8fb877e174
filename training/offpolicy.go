package training

import (
	"context"
	"math"
	"math/rand/v2"
	"slices"

	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distuv"
)

// WeightedReturn is one episode as importance sampling sees it: the ratio
// rho of the target's to the behaviour's probability of its actions, and
// its return G0.
type WeightedReturn struct {
	Ratio  float64
	Return float64
}

// ImportanceRatio is rho = prod_t pi(A_t|S_t) / b(A_t|S_t) over an episode,
// with pi the target's probability and b the behaviour's as stored. It
// reports false when a step has no behaviour probability: such an episode
// says nothing about the target.
func ImportanceRatio(ep EpisodeRecord, target func(state string, action int16) float64) (float64, bool) {
	if ep.Probabilities == nil {
		return 0, false
	}
	rho := 1.0
	for t, b := range ep.Probabilities {
		if b == 0 {
			return 0, false
		}
		if rho != 0 {
			rho *= target(ep.States[t], ep.Actions[t]) / b
		}
	}
	return rho, true
}

// OrdinaryIS is the ordinary importance-sampling estimate, the mean of
// rho G over the episodes (Sutton & Barto, 2nd ed., eq. 5.5). Unbiased; its
// variance can be large, even unbounded.
func OrdinaryIS(s []WeightedReturn) float64 {
	if len(s) == 0 {
		return 0
	}
	sum := 0.0
	for _, x := range s {
		sum += x.Ratio * x.Return
	}
	return sum / float64(len(s))
}

// WeightedIS is the weighted importance-sampling estimate,
// sum rho G / sum rho, and 0 when every ratio is 0 (same book, eq. 5.6).
// Biased for few episodes, consistent, and of far lower variance.
func WeightedIS(s []WeightedReturn) float64 {
	num, den := 0.0, 0.0
	for _, x := range s {
		num += x.Ratio * x.Return
		den += x.Ratio
	}
	if den == 0 {
		return 0
	}
	return num / den
}

// EffectiveSampleSize is (sum w)^2 / sum w^2 of the ratios: how many
// equally weighted episodes the weighted estimate is worth (0 when every
// ratio is 0).
func EffectiveSampleSize(s []WeightedReturn) float64 {
	sum, sq := 0.0, 0.0
	for _, x := range s {
		sum += x.Ratio
		sq += x.Ratio * x.Ratio
	}
	if sq == 0 {
		return 0
	}
	return sum * sum / sq
}

// Interval is a two-sided confidence interval.
type Interval struct {
	Low  float64 `json:"low"`
	High float64 `json:"high"`
}

// BootstrapIS gives percentile bootstrap intervals of the ordinary and the
// weighted estimate at the given level: it resamples the episodes with
// replacement resamples times, computes both estimates on each resample and
// takes the (1-level)/2 and (1+level)/2 quantiles of each. progress, when
// not nil, is told how many resamples are done now and then; it stops early
// with ctx's error when ctx ends.
//
// Episodes of ratio 0 add nothing to either sum, so each resample draws how
// many of its n picks land on the m others (binomial, n and m/n) and then
// picks only among those: the same distribution as n uniform picks, at a
// fraction of the cost when most ratios are 0, as they are when the
// behaviour rarely agrees with a greedy target for a whole episode.
func BootstrapIS(ctx context.Context, s []WeightedReturn, resamples int, level float64, rng *rand.Rand, progress func(done int)) (ordinary, weighted Interval, err error) {
	n := len(s)
	if n == 0 || resamples < 1 {
		return ordinary, weighted, nil
	}
	nonzero := make([]WeightedReturn, 0, n)
	for _, x := range s {
		if x.Ratio != 0 {
			nonzero = append(nonzero, x)
		}
	}
	m := len(nonzero)
	picks := distuv.Binomial{N: float64(n), P: float64(m) / float64(n), Src: rng}
	ords := make([]float64, resamples)
	wtds := make([]float64, resamples)
	for b := range resamples {
		k := n
		if m < n {
			k = int(picks.Rand())
		}
		num, den := 0.0, 0.0
		for range k {
			x := nonzero[rng.IntN(m)]
			num += x.Ratio * x.Return
			den += x.Ratio
		}
		ords[b] = num / float64(n)
		if den != 0 {
			wtds[b] = num / den
		}
		if (b+1)%16 == 0 {
			if err := ctx.Err(); err != nil {
				return ordinary, weighted, err
			}
			if progress != nil {
				progress(b + 1)
			}
		}
	}
	lo, hi := (1-level)/2, (1+level)/2
	slices.Sort(ords)
	slices.Sort(wtds)
	ordinary = Interval{Low: stat.Quantile(lo, stat.Empirical, ords, nil), High: stat.Quantile(hi, stat.Empirical, ords, nil)}
	weighted = Interval{Low: stat.Quantile(lo, stat.Empirical, wtds, nil), High: stat.Quantile(hi, stat.Empirical, wtds, nil)}
	return ordinary, weighted, nil
}

// TargetPolicy is the policy an evaluation asks about: greedy with respect
// to a Q table, or its epsilon-soft version. Greedy ties split the greedy
// probability evenly, and the settings' greedy rule (visits needed,
// untried actions, fallback) decides which actions may be greedy, as
// choosing does; where greedy has no answer every action has probability 0.
type TargetPolicy struct {
	table *QTable
	mode  Mode
	// epsilon of explore mode: a fixed rate, or the settings' per-state rule.
	epsilon  *float64
	settings Settings
	// fallback is the index of the settings' greedy fallback in the
	// table's actions, -1 for none.
	fallback int
	cache    map[string][]float64
}

// NewTargetPolicy returns the greedy (mode Greedy) or epsilon-soft (mode
// Explore) policy of a table. In explore mode the rate is epsilon when given,
// else the settings' rule applied to the state's visits, as choose does.
func NewTargetPolicy(table *QTable, mode Mode, epsilon *float64, settings Settings) *TargetPolicy {
	return &TargetPolicy{table: table, mode: mode, epsilon: epsilon, settings: settings,
		fallback: slices.Index(table.Actions, settings.GreedyFallback), cache: map[string][]float64{}}
}

// Probability is pi(action | state).
func (t *TargetPolicy) Probability(state string, action int16) float64 {
	probs, ok := t.cache[state]
	if !ok {
		s := t.table.state(state)
		// The greedy actions follow the policy's rule, as choosing does.
		g := t.settings.GreedyRule().Find(s.Q, s.Visits, t.fallback, t.mode)
		eps := t.settings.EpsilonFor(s.Total)
		if t.epsilon != nil {
			eps = *t.epsilon
		}
		probs = make([]float64, len(s.Q))
		for a := range s.Q {
			probs[a] = g.Probability(t.mode, eps, a, s.Q, s.Visits)
		}
		t.cache[state] = probs
	}
	return probs[action]
}

// behaviourMean is the mean return of the episodes.
func behaviourMean(s []WeightedReturn) float64 {
	if len(s) == 0 {
		return 0
	}
	sum := 0.0
	for _, x := range s {
		sum += x.Return
	}
	return sum / float64(len(s))
}

func finite(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }
