package client

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"time"
)

// EpisodeWindow says which stored episodes a job reads: the last N, or a
// time range; all when empty. AfterSnapshot narrows either to the episodes
// that snapshot has not learned from (a held-out window).
type EpisodeWindow struct {
	Last          int       `json:"last,omitempty"`
	Since         time.Time `json:"since,omitzero"`
	Until         time.Time `json:"until,omitzero"`
	AfterSnapshot string    `json:"after_snapshot,omitempty"`
}

// EvaluationTarget is the table an evaluation judges and how it would choose.
type EvaluationTarget struct {
	// Policy owns the table; empty means the evaluated policy.
	Policy string `json:"policy,omitempty"`
	// Table is LiveTable (the default) or a snapshot's name.
	Table string `json:"table,omitempty"`
	// Mode is Greedy (the default) or Explore.
	Mode Mode `json:"mode,omitempty"`
	// Epsilon, when set, is a fixed rate for Explore.
	Epsilon *float64 `json:"epsilon,omitempty"`
}

// EvaluationRequest starts an off-policy evaluation.
type EvaluationRequest struct {
	Target EvaluationTarget `json:"target,omitzero"`
	Window EpisodeWindow    `json:"window,omitzero"`
	// Resamples of the percentile bootstrap; 0 means the service's 1000.
	Resamples int `json:"resamples,omitempty"`
	// Seed makes the bootstrap repeatable; nil lets the service draw one.
	Seed *uint64 `json:"seed,omitempty"`
}

// ReplayRequest starts a replay of stored episodes into a new policy with
// other settings; nil settings are the source policy's.
type ReplayRequest struct {
	Target             string        `json:"target"`
	Gamma              *float64      `json:"gamma,omitempty"`
	Alpha              *float64      `json:"alpha,omitempty"`
	Epsilon            *float64      `json:"epsilon,omitempty"`
	EpsilonMin         *float64      `json:"epsilon_min,omitempty"`
	EpsilonDecayVisits *float64      `json:"epsilon_decay_visits,omitempty"`
	Visit              string        `json:"visit,omitempty"`
	InitialQ           *float64      `json:"initial_q,omitempty"`
	Window             EpisodeWindow `json:"window,omitzero"`
}

// Progress is how far a job got in its current phase.
type Progress struct {
	Phase string `json:"phase"`
	Done  int64  `json:"done"`
	Total int64  `json:"total"`
}

// EpisodeSpan is the window a job resolved when it was posted.
type EpisodeSpan struct {
	FirstSeq int64     `json:"first_seq"`
	LastSeq  int64     `json:"last_seq"`
	Since    time.Time `json:"since,omitzero"`
	Until    time.Time `json:"until,omitzero"`
	Episodes int64     `json:"episodes"`
}

// Job statuses.
const (
	JobQueued    = "queued"
	JobRunning   = "running"
	JobSucceeded = "succeeded"
	JobFailed    = "failed"
)

// Job is an evaluation or a replay as the service reports it; Result is
// set once it succeeded.
type Job[R any] struct {
	ID       int64    `json:"id"`
	Kind     string   `json:"kind"`
	Policy   string   `json:"policy"`
	Status   string   `json:"status"`
	Progress Progress `json:"progress"`
	// Request is the request as the service completed it with defaults.
	Request    json.RawMessage `json:"request"`
	Episodes   EpisodeSpan     `json:"episodes"`
	Result     *R              `json:"result,omitempty"`
	Error      string          `json:"error,omitempty"`
	CreatedAt  time.Time       `json:"created_at"`
	StartedAt  time.Time       `json:"started_at,omitzero"`
	FinishedAt time.Time       `json:"finished_at,omitzero"`
}

// Finished says the job succeeded or failed.
func (j Job[R]) Finished() bool { return j.Status == JobSucceeded || j.Status == JobFailed }

// Estimate is an importance-sampling estimate with its bootstrap interval.
type Estimate struct {
	Estimate float64 `json:"estimate"`
	Interval struct {
		Low  float64 `json:"low"`
		High float64 `json:"high"`
	} `json:"interval"`
}

// EvaluationResult is what an evaluation found.
type EvaluationResult struct {
	Ordinary                     Estimate `json:"ordinary"`
	Weighted                     Estimate `json:"weighted"`
	EffectiveSampleSize          float64  `json:"effective_sample_size"`
	BehaviourMeanReturn          float64  `json:"behaviour_mean_return"`
	EpisodesRead                 int64    `json:"episodes_read"`
	EpisodesUsed                 int64    `json:"episodes_used"`
	EpisodesWithoutProbabilities int64    `json:"episodes_without_probabilities"`
	ZeroWeightEpisodes           int64    `json:"zero_weight_episodes"`
	// EpisodesTrainedIntoTarget were already learned by the judged table:
	// judged on them it looks better than it is.
	EpisodesTrainedIntoTarget int64 `json:"episodes_trained_into_target"`
	Table                     struct {
		Policy            string  `json:"policy"`
		Name              string  `json:"name"`
		Revision          int64   `json:"revision"`
		InitialQ          float64 `json:"initial_q"`
		TrainedThroughSeq int64   `json:"trained_through_seq"`
	} `json:"table"`
	Level                  float64  `json:"level"`
	Resamples              int      `json:"resamples"`
	Seed                   uint64   `json:"seed"`
	Notes                  []string `json:"notes"`
	StepsWithoutAllowed    int64    `json:"steps_without_allowed"`
	EpisodesWithoutAllowed int64    `json:"episodes_without_allowed"`
}

// ReplayResult is what a replay did.
type ReplayResult struct {
	Target           string `json:"target"`
	EpisodesReplayed int64  `json:"episodes_replayed"`
	Steps            int64  `json:"steps"`
	Updates          int64  `json:"updates"`
	Revision         int64  `json:"revision"`
}

// EvaluationJob and ReplayJob are the two kinds of job.
type (
	EvaluationJob = Job[EvaluationResult]
	ReplayJob     = Job[ReplayResult]
)

// JobFailedError is a job that ended as failed.
type JobFailedError struct {
	Kind   string
	ID     int64
	Reason string
}

func (e *JobFailedError) Error() string {
	return fmt.Sprintf("%s %d failed: %s", e.Kind, e.ID, e.Reason)
}

// StartEvaluation queues an evaluation and returns the job at once. It is
// sent again only after a 429 (another try after a lost answer would queue
// a second job).
func (c *Client) StartEvaluation(ctx context.Context, policy string, req EvaluationRequest) (EvaluationJob, error) {
	var j EvaluationJob
	_, err := c.sendJSON(ctx, http.MethodPost, policyPath(policy, "evaluations"), false, req, &j)
	return j, err
}

// Evaluation reads an evaluation job.
func (c *Client) Evaluation(ctx context.Context, policy string, id int64) (EvaluationJob, error) {
	return getJob[EvaluationResult](ctx, c, policyPath(policy, "evaluations", itoa(id)))
}

// Evaluate starts an evaluation, waits for it, reporting its progress to
// progress (nil: none) whenever it changes, and returns its result.
func (c *Client) Evaluate(ctx context.Context, policy string, req EvaluationRequest, progress func(Progress)) (EvaluationResult, error) {
	j, err := c.StartEvaluation(ctx, policy, req)
	if err != nil {
		return EvaluationResult{}, err
	}
	j, err = waitJob(ctx, c, policyPath(policy, "evaluations", itoa(j.ID)), j, progress)
	if err != nil {
		return EvaluationResult{}, err
	}
	return *j.Result, nil
}

// StartReplay queues a replay into a new policy and returns the job at
// once. It is sent again only after a 429.
func (c *Client) StartReplay(ctx context.Context, policy string, req ReplayRequest) (ReplayJob, error) {
	var j ReplayJob
	_, err := c.sendJSON(ctx, http.MethodPost, policyPath(policy, "replays"), false, req, &j)
	return j, err
}

// Replay reads a replay job.
func (c *Client) Replay(ctx context.Context, policy string, id int64) (ReplayJob, error) {
	return getJob[ReplayResult](ctx, c, policyPath(policy, "replays", itoa(id)))
}

// RunReplay starts a replay, waits for it, reporting progress as Evaluate
// does, and returns its result.
func (c *Client) RunReplay(ctx context.Context, policy string, req ReplayRequest, progress func(Progress)) (ReplayResult, error) {
	j, err := c.StartReplay(ctx, policy, req)
	if err != nil {
		return ReplayResult{}, err
	}
	j, err = waitJob(ctx, c, policyPath(policy, "replays", itoa(j.ID)), j, progress)
	if err != nil {
		return ReplayResult{}, err
	}
	return *j.Result, nil
}

func getJob[R any](ctx context.Context, c *Client, path string) (Job[R], error) {
	var j Job[R]
	_, err := c.doJSON(ctx, call{method: http.MethodGet, path: path, repeatable: true}, &j)
	return j, err
}

// waitJob polls a job every PollInterval until it finishes, calling
// progress with each new reading; a failed job is a *JobFailedError.
func waitJob[R any](ctx context.Context, c *Client, path string, j Job[R], progress func(Progress)) (Job[R], error) {
	var last *Progress
	for {
		if progress != nil && (last == nil || *last != j.Progress) {
			p := j.Progress
			last = &p
			progress(p)
		}
		switch {
		case j.Status == JobFailed:
			return j, &JobFailedError{Kind: j.Kind, ID: j.ID, Reason: j.Error}
		case j.Status == JobSucceeded && j.Result == nil:
			return j, fmt.Errorf("%s %d succeeded without a result", j.Kind, j.ID)
		case j.Status == JobSucceeded:
			return j, nil
		}
		if err := sleep(ctx, c.opts.PollInterval); err != nil {
			return j, err
		}
		var err error
		if j, err = getJob[R](ctx, c, path); err != nil {
			return j, err
		}
	}
}
