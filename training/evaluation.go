package training

import (
	"cmp"
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"time"
)

// EpisodeWindow selects a policy's stored episodes: the last Last of them,
// or those received in [Since, Until) (either end may be open). The zero
// window is every stored episode. AfterSnapshot, with either, keeps only
// the episodes that snapshot's table has not learned from: those received
// after it was taken and those still waiting for training then.
type EpisodeWindow struct {
	Last          int64      `json:"last,omitempty"`
	Since         *time.Time `json:"since,omitempty"`
	Until         *time.Time `json:"until,omitempty"`
	AfterSnapshot string     `json:"after_snapshot,omitempty"`
}

// MaxWindowEpisodes bounds the "last" count of a window.
const MaxWindowEpisodes = 100_000_000

// Validate checks the window's fields.
func (w EpisodeWindow) Validate() error {
	var l problemList
	w.check(&l)
	return l.err()
}

func (w EpisodeWindow) check(l *problemList) {
	if w.Last < 0 || w.Last > MaxWindowEpisodes {
		l.add(-1, -1, "window.last", "must be between 1 and %d", MaxWindowEpisodes)
	}
	if w.Last > 0 && (w.Since != nil || w.Until != nil) {
		l.add(-1, -1, "window", "give either last or since/until, not both")
	}
	if w.Since != nil && w.Until != nil && !w.Since.Before(*w.Until) {
		l.add(-1, -1, "window.until", "must be later than since")
	}
	if w.AfterSnapshot != "" && ValidateSnapshotName(w.AfterSnapshot) != nil {
		l.add(-1, -1, "window.after_snapshot", "must name a snapshot of the policy")
	}
}

// EpisodeSpan is a window resolved, when a job is posted, to the arrival
// sequence numbers it covers, so that a job run again reads the same
// episodes however many arrived since. Pruning keeps the span's episodes
// while the job is queued or running.
type EpisodeSpan struct {
	FirstSeq int64      `json:"first_seq"`
	LastSeq  int64      `json:"last_seq"`
	Since    *time.Time `json:"since,omitempty"`
	Until    *time.Time `json:"until,omitempty"`
	// Episodes is how many the span held when it was resolved.
	Episodes int64 `json:"episodes"`
}

// EvaluationTarget names the policy to evaluate: greedy (or epsilon-soft)
// with respect to a Q table.
type EvaluationTarget struct {
	// Policy owns the table; empty means the policy whose episodes are read.
	// Its actions must be the same, in the same order.
	Policy PolicyName `json:"policy,omitempty"`
	// Table is LiveTable or a snapshot's name.
	Table string `json:"table"`
	// Mode is Greedy, or Explore for the epsilon-soft version.
	Mode Mode `json:"mode"`
	// Epsilon fixes explore mode's rate; without it the target policy's
	// own rule applies per state, as choose uses it.
	Epsilon *float64 `json:"epsilon,omitempty"`
}

// Bootstrap resample counts.
const (
	DefaultResamples = 1000
	MaxResamples     = 20_000
	// IntervalLevel is the coverage of reported intervals.
	IntervalLevel = 0.95
	// maxSeed keeps seeds exact in JSON numbers (IEEE doubles).
	maxSeed = 1<<53 - 1
)

// EvaluationRequest asks for an off-policy estimate of a target policy's
// expected return from stored episodes.
type EvaluationRequest struct {
	Target EvaluationTarget `json:"target"`
	Window EpisodeWindow    `json:"window"`
	// Resamples of the bootstrap.
	Resamples int `json:"resamples"`
	// Seed makes the bootstrap repeatable; one is drawn when not given.
	Seed *int64 `json:"seed,omitempty"`
}

// WithDefaults fills in what the client left out.
func (r EvaluationRequest) WithDefaults() EvaluationRequest {
	if r.Target.Table == "" {
		r.Target.Table = LiveTable
	}
	if r.Target.Mode == "" {
		r.Target.Mode = Greedy
	}
	if r.Resamples == 0 {
		r.Resamples = DefaultResamples
	}
	if r.Seed == nil {
		seed := rand.Int64N(maxSeed)
		r.Seed = &seed
	}
	return r
}

// Validate checks a request with its defaults filled in.
func (r EvaluationRequest) Validate() error {
	var l problemList
	if r.Target.Policy != "" {
		if ValidatePolicyName(string(r.Target.Policy)) != nil {
			l.add(-1, -1, "target.policy", "is not a valid policy name")
		}
	}
	if err := ValidateTableName("target.table", r.Target.Table); err != nil {
		l.add(-1, -1, "target.table", "must be %q or a snapshot name", LiveTable)
	}
	switch r.Target.Mode {
	case Greedy:
		if r.Target.Epsilon != nil {
			l.add(-1, -1, "target.epsilon", "applies to explore mode only")
		}
	case Explore:
		if e := r.Target.Epsilon; e != nil && !(*e >= 0 && *e <= 1) {
			l.add(-1, -1, "target.epsilon", "must be between 0 and 1")
		}
	default:
		l.add(-1, -1, "target.mode", "must be %q or %q", Greedy, Explore)
	}
	if r.Resamples < 1 || r.Resamples > MaxResamples {
		l.add(-1, -1, "resamples", "must be between 1 and %d", MaxResamples)
	}
	if r.Seed != nil && (*r.Seed < 0 || *r.Seed > maxSeed) {
		l.add(-1, -1, "seed", "must be between 0 and %d", int64(maxSeed))
	}
	r.Window.check(&l)
	return l.err()
}

// EvaluationJob is an evaluation as queued: the request with the policies
// and episodes it was resolved to when posted.
type EvaluationJob struct {
	Request        EvaluationRequest `json:"request"`
	PolicyID       int32             `json:"policy_id"`
	TargetPolicyID int32             `json:"target_policy_id"`
	Episodes       EpisodeSpan       `json:"episodes"`
	// ReplayedFromSeq, for a target of another policy, is where replays of
	// this policy's episodes into it began (the smallest first seq of
	// their windows); 0 when none did, and the target never learned from
	// these episodes.
	ReplayedFromSeq int64 `json:"replayed_from_seq,omitempty"`
}

// IntervalEstimate is one estimator's value and its bootstrap interval.
// Estimate is nil when it is too large for a float64; Interval is nil when
// the bootstrap gives none (a note says why).
type IntervalEstimate struct {
	Estimate *float64  `json:"estimate"`
	Interval *Interval `json:"interval"`
}

// EvaluationInputs are what an evaluation's numbers depend on besides the
// episodes and the seed.
type EvaluationInputs struct {
	// Gamma discounts the returns (the episodes' policy's).
	Gamma float64 `json:"gamma"`
	// Policy owns the target table; Table is LiveTable or a snapshot.
	Policy        string  `json:"policy"`
	Table         string  `json:"table"`
	TableRevision int64   `json:"table_revision"`
	InitialQ      float64 `json:"initial_q"`
	// TableTrainedThroughSeq is the seq of the last episode trained into
	// the table.
	TableTrainedThroughSeq int64 `json:"table_trained_through_seq"`
	Mode                   Mode  `json:"mode"`
	// Epsilon is explore mode's fixed rate; EpsilonRule the target
	// policy's per-state rule, when explore mode has no fixed rate.
	Epsilon     *float64     `json:"epsilon,omitempty"`
	EpsilonRule *EpsilonRule `json:"epsilon_rule,omitempty"`
}

// EpsilonRule is epsilon(s) = max(epsilon_min, epsilon k / (k + N(s))),
// k the decay visits (0: no decay).
type EpsilonRule struct {
	Epsilon            float64 `json:"epsilon"`
	EpsilonMin         float64 `json:"epsilon_min"`
	EpsilonDecayVisits float64 `json:"epsilon_decay_visits"`
}

// EvaluationResult is the answer of an evaluation.
type EvaluationResult struct {
	// Ordinary, Weighted and PerDecision are three importance-sampling
	// estimates of the target's expected return G0.
	Ordinary    IntervalEstimate `json:"ordinary"`
	Weighted    IntervalEstimate `json:"weighted"`
	PerDecision IntervalEstimate `json:"per_decision"`
	// PerDecisionMinusBehaviour is the per-decision estimate less the
	// behaviour's mean return, its interval from the same resamples as
	// both: how much better than what the episodes got the target is.
	PerDecisionMinusBehaviour IntervalEstimate `json:"per_decision_minus_behaviour"`
	// MeanRatio is the mean importance ratio, about 1 when the stored
	// probabilities are the behaviour's.
	MeanRatio IntervalEstimate `json:"mean_ratio"`
	// EffectiveSampleSize is (sum rho)^2 / sum rho^2.
	EffectiveSampleSize float64 `json:"effective_sample_size"`
	// LargestWeightShare is the largest rho over sum rho;
	// LargestRatioLog10 is log10 of the largest rho (it may be too large
	// for a float64), nil when every ratio is 0.
	LargestWeightShare float64  `json:"largest_weight_share"`
	LargestRatioLog10  *float64 `json:"largest_ratio_log10"`
	// WeightlessResampleShare is the share of bootstrap resamples that drew
	// no episode of positive weight: they have no weighted estimate.
	WeightlessResampleShare float64 `json:"weightless_resample_share"`
	// BehaviourMeanReturn is the mean G0 of the episodes used: what the
	// behaviour itself got.
	BehaviourMeanReturn float64 `json:"behaviour_mean_return"`
	// EpisodesRead were in the window; EpisodesUsed carried a behaviour
	// probability at every step; ZeroWeightEpisodes (among those used) took
	// an action the target never takes.
	EpisodesRead                 int64 `json:"episodes_read"`
	EpisodesUsed                 int64 `json:"episodes_used"`
	EpisodesWithoutProbabilities int64 `json:"episodes_without_probabilities"`
	ZeroWeightEpisodes           int64 `json:"zero_weight_episodes"`
	// EpisodesTrainedIntoTarget counts the episodes read that the target
	// table had already learned from: on those it is judged in-sample,
	// which flatters it.
	EpisodesTrainedIntoTarget int64            `json:"episodes_trained_into_target"`
	Inputs                    EvaluationInputs `json:"inputs"`
	Level                     float64          `json:"level"`
	Resamples                 int              `json:"resamples"`
	Seed                      int64            `json:"seed"`
	Notes                     []string         `json:"notes"`

	// StepsWithoutAllowed counts the steps of the episodes used that carry
	// no allowed set (the target's probability there is over every action);
	// EpisodesWithoutAllowed counts the episodes used with any such step.
	StepsWithoutAllowed    int64 `json:"steps_without_allowed"`
	EpisodesWithoutAllowed int64 `json:"episodes_without_allowed"`
}

// Progress says how far a job is.
type Progress struct {
	Phase string `json:"phase"`
	Done  int64  `json:"done"`
	Total int64  `json:"total"`
}

// EpisodeReader reads a policy's stored episodes in a span, in arrival
// order, calling fn for each; it holds no connection while fn runs.
type EpisodeReader interface {
	ReadEpisodes(ctx context.Context, policyID int32, span EpisodeSpan, fn func(StoredEpisode) error) error
}

// EvaluationSource is what an evaluation reads.
type EvaluationSource interface {
	EpisodeReader
	PolicyByID(ctx context.Context, id int32) (Policy, error)
	// LoadTable reads a policy's live table or one of its snapshots.
	LoadTable(ctx context.Context, policyID int32, table string) (*QTable, error)
}

// Evaluate estimates the target's expected return from the episodes of the
// job's span by ordinary, weighted and per-decision importance sampling,
// with bootstrap intervals, reporting progress as it goes.
func Evaluate(ctx context.Context, src EvaluationSource, job EvaluationJob, progress func(Progress)) (EvaluationResult, error) {
	req := job.Request
	p, err := src.PolicyByID(ctx, job.PolicyID)
	if err != nil {
		return EvaluationResult{}, err
	}
	tp := p
	if job.TargetPolicyID != job.PolicyID {
		if tp, err = src.PolicyByID(ctx, job.TargetPolicyID); err != nil {
			return EvaluationResult{}, err
		}
	}
	table, err := src.LoadTable(ctx, tp.ID, req.Target.Table)
	if err != nil {
		return EvaluationResult{}, err
	}
	if !slices.Equal(table.Actions, p.Actions) {
		return EvaluationResult{}, Conflictf("the target table's actions %q differ from the actions %q of policy %q's episodes", table.Actions, p.Actions, p.Name)
	}
	target := NewTargetPolicy(table, req.Target.Mode, req.Target.Epsilon, tp.Settings)
	res := EvaluationResult{Level: IntervalLevel, Resamples: req.Resamples, Seed: *req.Seed, Notes: []string{},
		Inputs: evaluationInputs(p, tp, table, req.Target)}
	trainedFrom := int64(1)
	if tp.ID != p.ID {
		trainedFrom = job.ReplayedFromSeq
	}
	var ratios []EpisodeRatio
	var largest largestRatios
	err = src.ReadEpisodes(ctx, p.ID, job.Episodes, func(ep StoredEpisode) error {
		res.EpisodesRead++
		if trainedFrom > 0 && trainedFrom <= ep.Seq && ep.Seq <= table.TrainedThroughSeq {
			res.EpisodesTrainedIntoTarget++
		}
		if res.EpisodesRead%1000 == 0 {
			progress(Progress{Phase: "reading episodes", Done: res.EpisodesRead, Total: job.Episodes.Episodes})
		}
		r, ok := ImportanceRatio(ep.EpisodeRecord, p.Gamma, target.Probability)
		if !ok {
			res.EpisodesWithoutProbabilities++
			return nil
		}
		ratios = append(ratios, r)
		largest.offer(ep.ID, r.LogRatio)
		if math.IsInf(r.LogRatio, -1) {
			res.ZeroWeightEpisodes++
		}
		if n := ep.StepsWithoutAllowed(); n > 0 {
			res.StepsWithoutAllowed += int64(n)
			res.EpisodesWithoutAllowed++
		}
		return nil
	})
	if err != nil {
		return EvaluationResult{}, err
	}
	res.EpisodesUsed = int64(len(ratios))
	switch {
	case res.EpisodesRead == 0:
		return res, Invalid(-1, -1, "window", "holds no stored episodes of policy %q", p.Name)
	case len(ratios) == 0:
		return res, Invalid(-1, -1, "window", "none of its %d episodes carries a behaviour probability at every step, so none says anything about another policy; post steps with \"probability\" (the chance the behaviour gave the action taken)", res.EpisodesRead)
	}
	if res.EpisodesTrainedIntoTarget > 0 {
		res.Notes = append(res.Notes, fmt.Sprintf("%d of the %d episodes read were already trained into the target table: judged on what it learned from, "+
			"a greedy table looks better than it is; for an honest estimate, evaluate a snapshot on the episodes after it (window.after_snapshot)",
			res.EpisodesTrainedIntoTarget, res.EpisodesRead))
	}
	if res.EpisodesWithoutProbabilities > 0 {
		res.Notes = append(res.Notes, fmt.Sprintf("%d episodes lack a behaviour probability on some step and were left out", res.EpisodesWithoutProbabilities))
	}
	if res.StepsWithoutAllowed > 0 {
		res.Notes = append(res.Notes, fmt.Sprintf("%d steps in %d of the episodes used carry no allowed set, so the target's probabilities there are taken over all %d actions; "+
			"if choose was given \"allowed\" for them, post each step with the allowed set the choose answer returns, or the estimates are biased", res.StepsWithoutAllowed, res.EpisodesWithoutAllowed, len(p.Actions)))
	}
	if res.ZeroWeightEpisodes == res.EpisodesUsed {
		res.Notes = append(res.Notes, "every episode used took some action the target never takes, so all weights are 0: the estimates are 0 by convention and say nothing; widen the window or evaluate an epsilon-soft target")
	}
	sample := NewISSample(ratios)
	res.Notes = append(res.Notes, largest.absurd(ratios)...)
	res.BehaviourMeanReturn = sample.BehaviourMean()
	res.EffectiveSampleSize = sample.EffectiveSampleSize()
	res.LargestWeightShare = sample.LargestWeightShare()
	if res.ZeroWeightEpisodes < res.EpisodesUsed {
		top := sample.LogRatioScale / math.Ln10
		res.LargestRatioLog10 = &top
	}
	rng := rand.New(rand.NewPCG(uint64(*req.Seed), bootstrapStream))
	total := int64(req.Resamples)
	progress(Progress{Phase: "bootstrap", Done: 0, Total: total})
	iv, err := BootstrapIS(ctx, sample, req.Resamples, IntervalLevel, rng, func(done int) {
		progress(Progress{Phase: "bootstrap", Done: int64(done), Total: total})
	})
	if err != nil {
		return EvaluationResult{}, err
	}
	res.Ordinary = intervalEstimate(sample.Ordinary(), iv.Ordinary)
	res.Weighted = intervalEstimate(sample.Weighted(), iv.Weighted)
	res.PerDecision = intervalEstimate(sample.PerDecision(), iv.PerDecision)
	res.MeanRatio = intervalEstimate(sample.MeanRatio(), iv.MeanRatio)
	res.PerDecisionMinusBehaviour = intervalEstimate(sample.PerDecisionMinusBehaviour(), iv.Difference)
	res.WeightlessResampleShare = iv.WeightlessShare
	res.Notes = append(res.Notes, iv.Notes...)
	res.Notes = append(res.Notes, reportNotes(res)...)
	progress(Progress{Phase: "done", Done: total, Total: total})
	return res, nil
}

func evaluationInputs(p, tp Policy, table *QTable, target EvaluationTarget) EvaluationInputs {
	in := EvaluationInputs{Gamma: p.Gamma, Policy: tp.Name, Table: target.Table, TableRevision: table.Revision,
		InitialQ: table.InitialQ, TableTrainedThroughSeq: table.TrainedThroughSeq, Mode: target.Mode, Epsilon: target.Epsilon}
	if target.Mode == Explore && target.Epsilon == nil {
		in.EpsilonRule = &EpsilonRule{Epsilon: tp.Epsilon, EpsilonMin: tp.EpsilonMin, EpsilonDecayVisits: tp.EpsilonDecayVisits}
	}
	return in
}

// intervalEstimate keeps an estimate only when a float64 holds it.
func intervalEstimate(estimate float64, iv *Interval) IntervalEstimate {
	out := IntervalEstimate{Interval: iv}
	if finite(estimate) {
		out.Estimate = &estimate
	}
	return out
}

// absurdRatioFactor: under correctly stored probabilities a ratio is at
// least R with chance at most 1/R (Markov's inequality, as E_b[rho] <= 1),
// so among n episodes one of at least 1000 n turns up with chance at most
// 0.001.
const absurdRatioFactor = 1000

// largestRatios keeps the episodes of the three largest ratios, to name
// them without keeping every episode's id.
type largestRatios []namedRatio

type namedRatio struct {
	id       string
	logRatio float64
}

func (l *largestRatios) offer(id string, logRatio float64) {
	if len(*l) == 3 && logRatio <= (*l)[2].logRatio {
		return
	}
	*l = append(*l, namedRatio{id, logRatio})
	slices.SortStableFunc(*l, func(a, b namedRatio) int { return cmp.Compare(b.logRatio, a.logRatio) })
	*l = (*l)[:min(len(*l), 3)]
}

// absurd says, in a note, how many ratios are too large to be believed,
// naming the largest.
func (l largestRatios) absurd(ratios []EpisodeRatio) []string {
	limit := math.Log(absurdRatioFactor * float64(len(ratios)))
	count := 0
	for _, r := range ratios {
		if r.LogRatio > limit {
			count++
		}
	}
	if count == 0 {
		return nil
	}
	var named []string
	for _, r := range l {
		if r.logRatio > limit {
			named = append(named, fmt.Sprintf("%q (1e%.0f)", r.id, r.logRatio/math.Ln10))
		}
	}
	return []string{fmt.Sprintf("%d episodes have an importance ratio above %d times the number of episodes, which correctly stored behaviour probabilities give with chance below 0.001; the largest: %s; check the probabilities posted for them (one posted for another action, or far too small): the weighted estimate rests on them", count, absurdRatioFactor, strings.Join(named, ", "))}
}

// smallEffectiveSampleSize is where the report starts warning that the
// weighted estimate rests on few episodes (our choice of threshold).
const smallEffectiveSampleSize = 100

// reportNotes says what a reader of the numbers must know.
func reportNotes(res EvaluationResult) []string {
	var notes []string
	for _, e := range []struct {
		name string
		est  IntervalEstimate
	}{{"ordinary", res.Ordinary}, {"per-decision", res.PerDecision}, {"mean ratio", res.MeanRatio}, {"per-decision minus behaviour", res.PerDecisionMinusBehaviour}} {
		if e.est.Estimate == nil {
			notes = append(notes, fmt.Sprintf("the %s estimate is too large for a 64-bit float (left out, null)", e.name))
		}
	}
	if res.ZeroWeightEpisodes < res.EpisodesUsed && res.EffectiveSampleSize < smallEffectiveSampleSize {
		notes = append(notes, fmt.Sprintf("the weights are worth only %.1f equally weighted episodes (the largest carries %.0f%% of the total weight): the estimates and intervals rest on few episodes", res.EffectiveSampleSize, 100*res.LargestWeightShare))
	}
	if iv := res.MeanRatio.Interval; iv != nil && (iv.Low > 1 || iv.High < 1) {
		notes = append(notes, fmt.Sprintf("warning: the mean importance ratio's %.0f%% interval [%.4g, %.4g] excludes 1, its expected value when the stored probabilities are the behaviour's and the behaviour could take every action the target takes; likely causes: probabilities posted that are not the ones choose returned for the action taken, steps chosen from a mask posted without \"allowed\", or episodes chosen in greedy mode (probability 1 for one action, so the target's other choices are never covered)", 100*res.Level, iv.Low, iv.High))
	}
	return notes
}

// bootstrapStream is the second PCG word of the bootstrap generator; the
// seed is the first.
const bootstrapStream = 0x626f6f74
