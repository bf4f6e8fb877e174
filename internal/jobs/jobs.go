package jobs

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"sync"
	"time"

	"github.com/qtally/qtally/training"
)

// Kind names a kind of background job.
type Kind string

// Kinds of jobs.
const (
	EvaluationKind Kind = "evaluation"
	ReplayKind     Kind = "replay"
)

// Status is where a job stands.
type Status string

// Job statuses.
const (
	Queued    Status = "queued"
	Running   Status = "running"
	Succeeded Status = "succeeded"
	Failed    Status = "failed"
)

// Job is a claimed job: what a runner needs to do it.
type Job struct {
	ID       int64
	PolicyID int32
	Kind     Kind
	// Spec is the kind's job document (training.EvaluationJob or training.ReplayJob).
	Spec     json.RawMessage
	Attempts int
}

// View is a job as clients see it.
type View struct {
	ID       int64             `json:"id"`
	Kind     Kind              `json:"kind"`
	Policy   string            `json:"policy"`
	Status   Status            `json:"status"`
	Progress training.Progress `json:"progress"`
	// Request is the request as normalised when posted (defaults filled in).
	Request json.RawMessage `json:"request"`
	// Episodes is the request's window as resolved when posted.
	Episodes training.EpisodeSpan `json:"episodes"`
	// Result is the kind's result once the job succeeded.
	Result     json.RawMessage `json:"result,omitempty"`
	Error      string          `json:"error,omitempty"`
	CreatedAt  time.Time       `json:"created_at"`
	StartedAt  *time.Time      `json:"started_at,omitempty"`
	FinishedAt *time.Time      `json:"finished_at,omitempty"`
}

// Sizes of a page of jobs.
const (
	DefaultPage = 50
	MaxPage     = 500
)

// Query asks for one page of a policy's jobs of a kind, newest first.
type Query struct {
	Limit int
	// Before continues a listing with the jobs older than this id; 0
	// starts it.
	Before int64
}

// Page is one page of jobs; Next, when not 0, continues the listing.
type Page struct {
	Jobs []View
	Next int64
}

// NotFoundError says a policy has no job of a kind with an id. Job ids
// are numbered across all policies, so an id may be another policy's, or
// this policy's job of the other kind (OtherKind).
type NotFoundError struct {
	Policy    string
	Kind      Kind
	ID        int64
	OtherKind Kind
}

func (e *NotFoundError) Error() string {
	if e.OtherKind != "" {
		return fmt.Sprintf("policy %q has no %s job %d: job %d is its %s", e.Policy, e.Kind, e.ID, e.ID, e.OtherKind)
	}
	return fmt.Sprintf("policy %q has no %s job %d", e.Policy, e.Kind, e.ID)
}

func (e *NotFoundError) Unwrap() error { return training.ErrNotFound }

// Store keeps jobs in the database, so that any process can report on a
// job any other runs.
type Store interface {
	// ClaimJob marks the oldest queued job, or a running one whose runner
	// has not reported for staleAfter, as running by this caller. Jobs
	// claimed maxAttempts times already are failed instead.
	ClaimJob(ctx context.Context, staleAfter time.Duration, maxAttempts int) (Job, bool, error)
	// ReportProgress records progress and that the runner is alive.
	ReportProgress(ctx context.Context, job Job, p training.Progress) error
	// FinishJob records a result (failure empty) or a failure message.
	FinishJob(ctx context.Context, job Job, p training.Progress, result any, failure string) error
	// ReleaseJob puts a job back in the queue for another runner.
	ReleaseJob(ctx context.Context, job Job) error
}

// Runner runs queued jobs, one at a time, until its context ends.
type Runner struct {
	Jobs        Store
	Evaluations training.EvaluationSource
	Replays     training.ReplayStore
	// Batch bounds what one replay transaction learns.
	Batch training.BatchLimits
	// Wake receives a value when a job is queued; PollInterval is the
	// fallback for missed notifications.
	Wake         <-chan struct{}
	PollInterval time.Duration
	// ReportInterval paces progress writes, which double as heartbeats;
	// a job not heard of for StaleAfter is claimed again, at most
	// MaxAttempts times in all.
	ReportInterval time.Duration
	StaleAfter     time.Duration
	MaxAttempts    int
	Logger         *slog.Logger
}

// Run claims and runs jobs until ctx ends. A job cut short by the end of
// ctx goes back to the queue.
func (r *Runner) Run(ctx context.Context) error {
	poll := time.NewTimer(0)
	defer poll.Stop()
	backoff := time.Duration(0)
	for ctx.Err() == nil {
		job, found, err := r.Jobs.ClaimJob(ctx, r.StaleAfter, r.MaxAttempts)
		switch {
		case err != nil && ctx.Err() == nil:
			backoff = min(max(2*backoff, 100*time.Millisecond), 10*time.Second)
			r.Logger.Warn("claiming a job failed; retrying", "error", err, "retry_in", backoff)
			sleep(ctx, backoff)
			continue
		case found:
			backoff = 0
			r.run(ctx, job)
			continue
		}
		backoff = 0
		poll.Reset(r.PollInterval)
		select {
		case <-ctx.Done():
		case <-r.Wake:
		case <-poll.C:
		}
	}
	return nil
}

// run does one job, reporting its progress every ReportInterval.
func (r *Runner) run(ctx context.Context, job Job) {
	log := r.Logger.With("job_id", job.ID, "kind", job.Kind, "attempt", job.Attempts)
	log.Info("job started")
	var mu sync.Mutex
	latest := training.Progress{Phase: "starting"}
	progress := func(p training.Progress) {
		mu.Lock()
		latest = p
		mu.Unlock()
	}
	current := func() training.Progress {
		mu.Lock()
		defer mu.Unlock()
		return latest
	}
	jobCtx, cancel := context.WithCancel(ctx)
	reporterDone := make(chan struct{})
	go func() {
		defer close(reporterDone)
		t := time.NewTicker(r.ReportInterval)
		defer t.Stop()
		for {
			select {
			case <-jobCtx.Done():
				return
			case <-t.C:
				if err := r.Jobs.ReportProgress(jobCtx, job, current()); err != nil && jobCtx.Err() == nil {
					log.Warn("reporting job progress", "error", err)
				}
			}
		}
	}()
	result, err := r.do(jobCtx, job, progress)
	cancel()
	<-reporterDone

	// The outcome is written even as the process stops.
	finishCtx, done := context.WithTimeout(context.WithoutCancel(ctx), 10*time.Second)
	defer done()
	switch {
	case err != nil && (ctx.Err() != nil || errors.Is(err, training.ErrUnavailable)):
		log.Info("job interrupted; returning it to the queue", "error", err)
		if rerr := r.Jobs.ReleaseJob(finishCtx, job); rerr != nil {
			log.Warn("returning a job to the queue", "error", rerr)
		}
		if ctx.Err() == nil {
			sleep(ctx, time.Second) // the database is away: do not spin on the job
		}
		return
	case err != nil:
		log.Warn("job failed", "error", err)
		err = r.Jobs.FinishJob(finishCtx, job, current(), nil, failureMessage(err))
	default:
		log.Info("job succeeded")
		err = r.Jobs.FinishJob(finishCtx, job, current(), result, "")
	}
	if err != nil {
		log.Warn("recording a job's outcome", "error", err)
	}
}

func (r *Runner) do(ctx context.Context, job Job, progress func(training.Progress)) (any, error) {
	switch job.Kind {
	case EvaluationKind:
		var spec training.EvaluationJob
		if err := json.Unmarshal(job.Spec, &spec); err != nil {
			return nil, fmt.Errorf("decode evaluation job %d: %w", job.ID, err)
		}
		return training.Evaluate(ctx, r.Evaluations, spec, progress)
	case ReplayKind:
		var spec training.ReplayJob
		if err := json.Unmarshal(job.Spec, &spec); err != nil {
			return nil, fmt.Errorf("decode replay job %d: %w", job.ID, err)
		}
		return training.Replay(ctx, r.Replays, spec, r.Batch, progress)
	default:
		return nil, fmt.Errorf("job %d has unknown kind %q", job.ID, job.Kind)
	}
}

// failureMessage is what clients are told of a failed job: the domain's
// own message, or a pointer to the log for anything else.
func failureMessage(err error) string {
	var verr *training.ValidationError
	if errors.As(err, &verr) || errors.Is(err, training.ErrNotFound) || errors.Is(err, training.ErrConflict) {
		return err.Error()
	}
	return "the job failed on the server; see its log"
}

// sleep waits for d or the end of ctx, whichever comes first.
func sleep(ctx context.Context, d time.Duration) {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
	case <-t.C:
	}
}
