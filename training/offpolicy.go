package training

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"

	"gonum.org/v1/gonum/stat"
)

// EpisodeRatio is one episode as importance sampling sees it. Ratios are
// kept as logarithms: a product of many factors overflows or underflows a
// float64 long before it stops meaning something, and a ratio that is
// merely tiny must not pass for one that is 0.
type EpisodeRatio struct {
	// LogRatio is log rho, rho = prod_t pi(A_t|S_t) / b(A_t|S_t); it is
	// -Inf exactly when the target gives some action taken probability 0.
	LogRatio float64
	// Return is G0.
	Return float64
	// PerDecision times exp(LogPerDecisionScale) is the per-decision
	// return sum_t gamma^t rho_{0:t} R_{t+1} (Sutton & Barto, 2nd ed.,
	// section 5.9, eq. 5.15 from the first step, its number from memory):
	// each reward weighted by the ratio of the actions up to it only.
	PerDecision         float64
	LogPerDecisionScale float64
}

// ImportanceRatio computes an episode's ratios and return, with pi the
// target's probability of each step's action among the step's allowed
// actions (nil: all of them) and b the behaviour's as stored. It reports
// false when a step has no behaviour probability: such an episode says
// nothing about the target.
func ImportanceRatio(ep EpisodeRecord, gamma float64, target func(state string, allowed ActionSet, action int16) float64) (EpisodeRatio, bool) {
	if ep.Probabilities == nil {
		return EpisodeRatio{}, false
	}
	logGamma := math.Log(gamma)
	logRho, logDiscount := 0.0, 0.0
	perDecision := scaledSum{scale: math.Inf(-1)}
	for t, b := range ep.Probabilities {
		if b == 0 {
			return EpisodeRatio{}, false
		}
		logRho += math.Log(target(ep.States[t], ep.AllowedAt(t), ep.Actions[t])) - math.Log(b)
		if t > 0 {
			logDiscount += logGamma
		}
		perDecision.add(logDiscount+logRho, ep.Rewards[t])
	}
	g := 0.0
	for t := len(ep.Rewards) - 1; t >= 0; t-- {
		g = ep.Rewards[t] + gamma*g
	}
	return EpisodeRatio{LogRatio: logRho, Return: g, PerDecision: perDecision.sum, LogPerDecisionScale: perDecision.scale}, true
}

// scaledSum is a sum of terms exp(l) x held as sum exp(scale), scale the
// largest l so far, so that no term overflows on its own.
type scaledSum struct{ sum, scale float64 }

func (s *scaledSum) add(l, x float64) {
	if math.IsInf(l, -1) || x == 0 {
		return
	}
	if l > s.scale {
		s.sum *= math.Exp(s.scale - l)
		s.scale = l
	}
	s.sum += math.Exp(l-s.scale) * x
}

// WeightedReturn is one episode of an ISSample: its ratio and per-decision
// return in the sample's scales, and its return G0.
type WeightedReturn struct {
	Ratio       float64
	Return      float64
	PerDecision float64
}

// ISSample is a set of episodes brought to common scales: each ratio is
// stored divided by exp(LogRatioScale), the largest ratio, so that no sum
// of ratios or of their squares overflows; per-decision returns likewise.
// Weighted importance sampling and the effective sample size do not depend
// on the scale (a common factor of all ratios cancels).
type ISSample struct {
	Episodes            []WeightedReturn
	LogRatioScale       float64
	LogPerDecisionScale float64
}

// NewISSample brings episodes to common scales.
func NewISSample(eps []EpisodeRatio) ISSample {
	s := ISSample{Episodes: make([]WeightedReturn, len(eps)), LogRatioScale: math.Inf(-1), LogPerDecisionScale: math.Inf(-1)}
	for _, e := range eps {
		s.LogRatioScale = max(s.LogRatioScale, e.LogRatio)
		if e.PerDecision != 0 {
			s.LogPerDecisionScale = max(s.LogPerDecisionScale, e.LogPerDecisionScale)
		}
	}
	// Every ratio 0: no scale is needed, and none is exp(-Inf).
	if math.IsInf(s.LogRatioScale, -1) {
		s.LogRatioScale = 0
	}
	if math.IsInf(s.LogPerDecisionScale, -1) {
		s.LogPerDecisionScale = 0
	}
	for i, e := range eps {
		s.Episodes[i] = WeightedReturn{Ratio: math.Exp(e.LogRatio - s.LogRatioScale), Return: e.Return}
		if e.PerDecision != 0 {
			s.Episodes[i].PerDecision = e.PerDecision * math.Exp(e.LogPerDecisionScale-s.LogPerDecisionScale)
		}
	}
	return s
}

// Ordinary is the ordinary importance-sampling estimate, the mean of rho G
// over the episodes (Sutton & Barto, 2nd ed., eq. 5.5). Unbiased; its
// variance can be large, even unbounded. It is not finite when the ratios
// are too large for a float64.
func (s ISSample) Ordinary() float64 {
	return scaleBy(mean(s.Episodes, func(x WeightedReturn) float64 { return x.Ratio * x.Return }), s.LogRatioScale)
}

// Weighted is the weighted importance-sampling estimate, sum rho G / sum
// rho, and 0 when every ratio is 0 (same book, eq. 5.6). Biased for few
// episodes, consistent, and usually of lower variance.
func (s ISSample) Weighted() float64 {
	num, den := 0.0, 0.0
	for _, x := range s.Episodes {
		num += x.Ratio * x.Return
		den += x.Ratio
	}
	if den == 0 {
		return 0
	}
	return num / den
}

// PerDecision is the per-decision importance-sampling estimate, the mean
// per-decision return (same book, section 5.9): unbiased like the ordinary
// estimate, with less variance when rewards arrive before the last step.
func (s ISSample) PerDecision() float64 {
	return scaleBy(mean(s.Episodes, func(x WeightedReturn) float64 { return x.PerDecision }), s.LogPerDecisionScale)
}

// MeanRatio is the mean of rho. Its expectation under the behaviour is 1
// for any target that gives probability only to actions the behaviour
// could take (sum over action sequences of b rho = sum of pi = 1; same
// book, section 5.5), so a mean far from 1 says the stored probabilities
// are not the behaviour's.
func (s ISSample) MeanRatio() float64 {
	return scaleBy(mean(s.Episodes, func(x WeightedReturn) float64 { return x.Ratio }), s.LogRatioScale)
}

// PerDecisionMinusBehaviour is the mean over the episodes of the
// per-decision return less the return: the per-decision estimate less
// the behaviour's mean return.
func (s ISSample) PerDecisionMinusBehaviour() float64 {
	c := s.centres()
	return scaleBy(c.difference, c.differenceLogScale)
}

// BehaviourMean is the mean return of the episodes: what the behaviour got.
func (s ISSample) BehaviourMean() float64 {
	return mean(s.Episodes, func(x WeightedReturn) float64 { return x.Return })
}

// EffectiveSampleSize is (sum rho)^2 / sum rho^2: how many equally
// weighted episodes the weighted estimate is worth (0 when every ratio is
// 0).
func (s ISSample) EffectiveSampleSize() float64 {
	sum, sq := 0.0, 0.0
	for _, x := range s.Episodes {
		sum += x.Ratio
		sq += x.Ratio * x.Ratio
	}
	if sq == 0 {
		return 0
	}
	return sum * sum / sq
}

// LargestWeightShare is the share of sum rho that the largest ratio carries
// (0 when every ratio is 0).
func (s ISSample) LargestWeightShare() float64 {
	sum, top := 0.0, 0.0
	for _, x := range s.Episodes {
		sum += x.Ratio
		top = max(top, x.Ratio)
	}
	if sum == 0 {
		return 0
	}
	return top / sum
}

func mean(s []WeightedReturn, f func(WeightedReturn) float64) float64 {
	if len(s) == 0 {
		return 0
	}
	sum := 0.0
	for _, x := range s {
		sum += f(x)
	}
	return sum / float64(len(s))
}

// scaleBy is x exp(logScale), infinite when that is too large for a float64.
func scaleBy(x, logScale float64) float64 {
	if x == 0 {
		return 0
	}
	return math.Copysign(math.Exp(math.Log(math.Abs(x))+logScale), x)
}

// Interval is a two-sided confidence interval.
type Interval struct {
	Low  float64 `json:"low"`
	High float64 `json:"high"`
}

// Intervals are the bootstrap intervals of an ISSample's estimates, nil
// where the bootstrap gives none (Notes say why).
type Intervals struct {
	Ordinary, Weighted, PerDecision, MeanRatio *Interval
	// Difference is of the per-decision estimate minus the behaviour's
	// mean return, both from the same resamples.
	Difference *Interval
	// WeightlessShare is the share of resamples that drew no episode of
	// positive ratio: they have no weighted estimate (0/0) and are left
	// out of the weighted interval.
	WeightlessShare float64
	Notes           []string
}

// Statistics the bootstrap follows, in the order of resampleSums.estimates.
const (
	statOrdinary = iota
	statWeighted
	statPerDecision
	statMeanRatio
	statDifference
	statCount
)

var statNames = [statCount]string{"ordinary", "weighted", "per-decision", "mean ratio", "per-decision minus behaviour"}

// BootstrapIS gives bootstrap-t (studentized) intervals at the given level
// for the ordinary, weighted and per-decision estimates, the mean ratio,
// and the per-decision estimate minus the behaviour's mean return (the
// mean of each episode's per-decision return less its return). It
// resamples the episodes with replacement resamples times and computes,
// on each resample, every statistic and its standard error: the sample
// standard deviation over sqrt(n) for the means, the delta method
// sqrt(sum rho^2 (G - w)^2) / sum rho for the weighted estimate, a ratio
// of means. progress, when not nil, is told how many resamples are done
// now and then; it stops early with ctx's error when ctx ends.
//
// The intervals were chosen by their measured coverage on episodes with
// heavy-tailed ratios (docs/evaluation.md): for the means, the symmetric
// bootstrap-t, estimate +- q se with q the level quantile of |t*|; for the
// weighted estimate, whose errors are skewed and larger where its standard
// error is larger, the equal-tailed bootstrap-t.
//
// A resample that draws no episode of positive ratio has no weighted
// estimate. When such resamples are more than (1-level)/2 of all, the
// weighted interval is withheld (nil): the bootstrap distribution then
// lacks more than one tail's worth of mass, so wherever those resamples
// belong, an end of the interval would be set by them and not by the
// data. Below that share, either end moves at most within the informative
// resamples' range, so they are left out.
func BootstrapIS(ctx context.Context, s ISSample, resamples int, level float64, rng *rand.Rand, progress func(done int)) (Intervals, error) {
	var out Intervals
	n := len(s.Episodes)
	if n == 0 || resamples < 1 {
		return out, nil
	}
	c := s.centres()
	// The intervals are centred on the estimates as reported, computed
	// directly rather than from centred sums.
	estimate := [statCount]float64{
		statOrdinary:    mean(s.Episodes, func(x WeightedReturn) float64 { return x.Ratio * x.Return }),
		statWeighted:    s.Weighted(),
		statPerDecision: mean(s.Episodes, func(x WeightedReturn) float64 { return x.PerDecision }),
		statMeanRatio:   mean(s.Episodes, func(x WeightedReturn) float64 { return x.Ratio }),
		statDifference:  c.difference,
	}
	var theta, se [statCount][]float64
	for k := range statCount {
		theta[k], se[k] = make([]float64, 0, resamples), make([]float64, 0, resamples)
	}
	weightless := 0
	for b := range resamples {
		var sums resampleSums
		for range n {
			sums.add(s.Episodes[rng.IntN(n)], c)
		}
		if sums.r == 0 {
			weightless++
		}
		th, e := sums.estimates(c)
		for k := range statCount {
			if !math.IsNaN(th[k]) {
				theta[k], se[k] = append(theta[k], th[k]), append(se[k], e[k])
			}
		}
		if (b+1)%16 == 0 {
			if err := ctx.Err(); err != nil {
				return out, err
			}
			if progress != nil {
				progress(b + 1)
			}
		}
	}
	out.WeightlessShare = float64(weightless) / float64(resamples)
	stdErr, magnitude := s.stdErrs(estimate, c)
	withheld := out.WeightlessShare > (1-level)/2
	if withheld {
		out.Notes = append(out.Notes, fmt.Sprintf("%.1f%% of bootstrap resamples drew no episode of positive weight and have no weighted estimate; above %.1f%% they, not the data, would set an end of a %.0f%% interval, so the weighted interval is left out (null)", 100*out.WeightlessShare, 100*(1-level)/2, 100*level))
	}
	var iv [statCount]*Interval
	for k := range statCount {
		if len(theta[k]) == 0 || (k == statWeighted && withheld) {
			continue
		}
		iv[k] = studentized(estimate[k], stdErr[k], theta[k], se[k], level, k != statWeighted, roundingTolerance*magnitude[k])
		if iv[k] == nil {
			out.Notes = append(out.Notes, fmt.Sprintf("the %s interval is unbounded (left out, null): too many resamples differ from the sample with no spread to measure them by, as happens when very few episodes carry the weight", statNames[k]))
		}
	}
	out.Weighted = iv[statWeighted]
	out.Difference = scaleInterval(iv[statDifference], c.differenceLogScale)
	out.Ordinary = scaleInterval(iv[statOrdinary], s.LogRatioScale)
	out.MeanRatio = scaleInterval(iv[statMeanRatio], s.LogRatioScale)
	out.PerDecision = scaleInterval(iv[statPerDecision], s.LogPerDecisionScale)
	for k, scaled := range map[int]*Interval{statOrdinary: out.Ordinary, statMeanRatio: out.MeanRatio, statPerDecision: out.PerDecision, statDifference: out.Difference} {
		if iv[k] != nil && scaled == nil {
			out.Notes = append(out.Notes, fmt.Sprintf("the %s interval is too large for a 64-bit float (left out, null)", statNames[k]))
		}
	}
	slices.Sort(out.Notes)
	return out, nil
}

// roundingTolerance, times the largest magnitude a statistic is computed
// from, bounds the rounding noise of its sums: differences and standard
// errors below it are 0. (Sums of n terms carry noise of about sqrt(n)
// 1e-16 of their terms; this leaves room for a billion terms.)
const roundingTolerance = 1e-11

// studentized is the bootstrap-t interval from the resamples' estimates
// theta and standard errors se: estimate - t*_(1+level)/2 stdErr to
// estimate - t*_(1-level)/2 stdErr, or with symmetric, estimate +- the
// level quantile of |t*| times stdErr. Differences and standard errors
// within tolerance of 0 count as 0. It is nil when unbounded: when too
// many resamples differ from the estimate with a standard error of 0.
func studentized(estimate, stdErr float64, theta, se []float64, level float64, symmetric bool, tolerance float64) *Interval {
	if stdErr <= tolerance {
		return &Interval{Low: estimate, High: estimate}
	}
	t := make([]float64, len(theta))
	for i := range theta {
		d := theta[i] - estimate
		if symmetric {
			d = math.Abs(d)
		}
		switch {
		case math.Abs(d) <= tolerance:
			t[i] = 0
		case se[i] > tolerance:
			t[i] = d / se[i]
		default:
			t[i] = math.Inf(int(math.Copysign(1, d)))
		}
	}
	slices.Sort(t)
	quantile := func(p float64) float64 { return stat.Quantile(p, stat.Empirical, t, nil) }
	iv := &Interval{Low: estimate - quantile((1+level)/2)*stdErr, High: estimate - quantile((1-level)/2)*stdErr}
	if symmetric {
		q := quantile(level)
		iv = &Interval{Low: estimate - q*stdErr, High: estimate + q*stdErr}
	}
	if !finite(iv.Low) || !finite(iv.High) {
		return nil
	}
	return iv
}

// scaleInterval multiplies an interval by exp(logScale), nil when that is
// too large for a float64.
func scaleInterval(iv *Interval, logScale float64) *Interval {
	if iv == nil {
		return nil
	}
	out := &Interval{Low: scaleBy(iv.Low, logScale), High: scaleBy(iv.High, logScale)}
	if !finite(out.Low) || !finite(out.High) {
		return nil
	}
	return out
}

// centres are what resampleSums subtract, so that a large common offset
// of the returns does not cancel digits away. The difference of a
// per-decision return and a return is taken in its own scale,
// exp(differenceLogScale), so that neither part overflows:
// pdToDifference and returnToDifference take each part there.
type centres struct {
	ret, perDecision, difference                           float64
	differenceLogScale, pdToDifference, returnToDifference float64
}

func (s ISSample) centres() centres {
	c := centres{ret: s.BehaviourMean(), perDecision: mean(s.Episodes, func(x WeightedReturn) float64 { return x.PerDecision }),
		differenceLogScale: max(s.LogPerDecisionScale, 0)}
	c.pdToDifference = math.Exp(s.LogPerDecisionScale - c.differenceLogScale)
	c.returnToDifference = math.Exp(-c.differenceLogScale)
	c.difference = mean(s.Episodes, c.differenceOf)
	return c
}

// differenceOf is an episode's per-decision return less its return, in
// the difference's scale.
func (c centres) differenceOf(x WeightedReturn) float64 {
	return x.PerDecision*c.pdToDifference - x.Return*c.returnToDifference
}

// resampleSums are the sums over one resample's picks that the statistics
// and their standard errors need: r the ratio, g the return, p the
// per-decision return and d the per-decision return less the return, each
// less its centre.
type resampleSums struct {
	n                                              float64
	r, rr, rg, rrg, rrgg, g, gg, rgg, p, pp, d, dd float64
}

func (m *resampleSums) add(x WeightedReturn, c centres) {
	g, p := x.Return-c.ret, x.PerDecision-c.perDecision
	d := c.differenceOf(x) - c.difference
	rg := x.Ratio * g
	m.n++
	m.r += x.Ratio
	m.rr += x.Ratio * x.Ratio
	m.rg += rg
	m.rrg += x.Ratio * rg
	m.rrgg += rg * rg
	m.g += g
	m.gg += g * g
	m.rgg += rg * g
	m.p += p
	m.pp += p * p
	m.d += d
	m.dd += d * d
}

// estimates gives each statistic and its standard error (in the
// statistic's scale); the weighted estimate is NaN when every ratio is 0.
func (m resampleSums) estimates(c centres) (theta, se [statCount]float64) {
	n := m.n
	// spread is n-1 times the sample variance from a sum and a sum of squares.
	spread := func(sq, sum float64) float64 { return max(0, sq-sum*sum/n) }
	meanErr := func(ss float64) float64 {
		if n < 2 {
			return 0
		}
		return math.Sqrt(ss / (n * (n - 1)))
	}
	// Ordinary: the mean of r (g + centre).
	theta[statOrdinary] = (m.rg + c.ret*m.r) / n
	se[statOrdinary] = meanErr(max(0, spread(m.rrgg, m.rg)+2*c.ret*(m.rrg-m.rg*m.r/n)+c.ret*c.ret*spread(m.rr, m.r)))
	theta[statMeanRatio], se[statMeanRatio] = m.r/n, meanErr(spread(m.rr, m.r))
	theta[statPerDecision], se[statPerDecision] = c.perDecision+m.p/n, meanErr(spread(m.pp, m.p))
	theta[statDifference], se[statDifference] = c.difference+m.d/n, meanErr(spread(m.dd, m.d))
	if m.r == 0 {
		theta[statWeighted] = math.NaN()
		return theta, se
	}
	// Weighted: centre + wc, wc = sum r g / sum r; delta method.
	wc := m.rg / m.r
	theta[statWeighted] = c.ret + wc
	se[statWeighted] = math.Sqrt(max(0, m.rrgg-2*wc*m.rrg+wc*wc*m.rr)) / m.r
	return theta, se
}

// stdErrs are the statistics' standard errors on the whole sample, the
// same as estimates gives but in two passes, so that a sample without
// spread gives 0 but for rounding; and the largest magnitude each is
// computed from, which bounds that rounding.
func (s ISSample) stdErrs(estimate [statCount]float64, c centres) (stdErr, magnitude [statCount]float64) {
	var sq [statCount]float64
	for _, x := range s.Episodes {
		for k, v := range [statCount][2]float64{
			statOrdinary:    {x.Ratio * x.Return, estimate[statOrdinary]},
			statWeighted:    {x.Return, estimate[statWeighted]},
			statPerDecision: {x.PerDecision, estimate[statPerDecision]},
			statMeanRatio:   {x.Ratio, estimate[statMeanRatio]},
			statDifference:  {c.differenceOf(x), estimate[statDifference]},
		} {
			u := v[0] - v[1]
			if k == statWeighted {
				u *= x.Ratio
			}
			sq[k] += u * u
			magnitude[k] = max(magnitude[k], math.Abs(v[0]), math.Abs(v[1]))
		}
	}
	n := float64(len(s.Episodes))
	for k := range statCount {
		switch {
		case k == statWeighted:
			if sumRatio := n * mean(s.Episodes, func(x WeightedReturn) float64 { return x.Ratio }); sumRatio > 0 {
				stdErr[k] = math.Sqrt(sq[k]) / sumRatio
			}
		case n >= 2:
			stdErr[k] = math.Sqrt(sq[k] / (n * (n - 1)))
		}
	}
	return stdErr, magnitude
}

// TargetPolicy is the policy an evaluation asks about: greedy with respect
// to a Q table, or its epsilon-soft version, choosing among a step's
// allowed actions as choose does (ProbabilitiesAmong): the settings' greedy
// rule (visits needed, untried actions, fallback) decides which actions may
// be greedy, greedy ties split the greedy probability evenly, and where
// greedy has no answer every action has probability 0.
type TargetPolicy struct {
	table *QTable
	mode  Mode
	// epsilon of explore mode: a fixed rate, or the settings' per-state rule.
	epsilon  *float64
	settings Settings
	// fallback is the index of the settings' greedy fallback in the
	// table's actions, -1 for none.
	fallback int
	// cache holds, per state, the probabilities under each allowed set seen
	// (keyed by the set's bytes; "" is no set).
	cache map[string]map[string][]float64
}

// NewTargetPolicy returns the greedy (mode Greedy) or epsilon-soft (mode
// Explore) policy of a table. In explore mode the rate is epsilon when given,
// else the settings' rule applied to the state's visits, as choose does.
func NewTargetPolicy(table *QTable, mode Mode, epsilon *float64, settings Settings) *TargetPolicy {
	return &TargetPolicy{table: table, mode: mode, epsilon: epsilon, settings: settings,
		fallback: slices.Index(table.Actions, settings.GreedyFallback), cache: map[string]map[string][]float64{}}
}

// Probability is pi(action | state) when choosing among the allowed
// actions (every action when allowed is nil).
func (t *TargetPolicy) Probability(state string, allowed ActionSet, action int16) float64 {
	bySet, ok := t.cache[state]
	if !ok {
		bySet = map[string][]float64{}
		t.cache[state] = bySet
	}
	probs, ok := bySet[string(allowed)]
	if !ok {
		s := t.table.state(state)
		eps := t.settings.EpsilonFor(s.Total)
		if t.epsilon != nil {
			eps = *t.epsilon
		}
		probs = ProbabilitiesAmong(s.Q, s.Visits, allowed, t.settings.GreedyRule(), t.fallback, t.mode, eps)
		bySet[string(allowed)] = probs
	}
	return probs[action]
}

func finite(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }
