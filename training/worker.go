package training

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"time"
)

// BatchReport describes one committed training batch.
type BatchReport struct {
	PolicyID   int32
	PolicyName string
	Revision   int64
	Episodes   int
	Result     BatchResult
	Duration   time.Duration
}

// BatchTrainer is the storage side of the worker.
type BatchTrainer interface {
	// TrainBatch picks a policy that has untrained episodes and that no
	// other worker is training, reads them in arrival order within limits
	// with the estimates they touch, calls learn, and writes the result and
	// records them as trained in one transaction. It reports false when no
	// policy had work waiting.
	TrainBatch(ctx context.Context, limits BatchLimits, learn func(BatchInput) BatchResult) (BatchReport, bool, error)
}

// Worker trains stored episodes into Q until its context ends.
type Worker struct {
	Store BatchTrainer
	// Batch bounds what one transaction trains.
	Batch BatchLimits
	// Wake receives a value when episodes arrive; PollInterval is the
	// fallback for missed notifications.
	Wake         <-chan struct{}
	PollInterval time.Duration
	// BatchTimeout bounds one batch; a batch under way when the context
	// ends still commits within it.
	BatchTimeout time.Duration
	OnBatch      func(BatchReport)
	OnError      func(error)
	Logger       *slog.Logger
}

// Run trains until ctx ends. Errors are retried with backoff, never fatal:
// a failed batch rolls back and its episodes are claimed again. Settings
// that cannot work are refused at once: a zero poll interval would make
// an idle worker ask for work without pause.
func (w *Worker) Run(ctx context.Context) error {
	if err := w.check(); err != nil {
		return err
	}
	backoff := time.Duration(0)
	poll := time.NewTimer(0)
	defer poll.Stop()
	for {
		if ctx.Err() != nil {
			return nil
		}
		batchCtx, cancel := context.WithTimeout(context.WithoutCancel(ctx), w.BatchTimeout)
		report, found, err := w.Store.TrainBatch(batchCtx, w.Batch, Learn)
		cancel()
		switch {
		case err != nil:
			backoff = min(max(2*backoff, 100*time.Millisecond), 10*time.Second)
			w.Logger.Warn("training batch failed; retrying", "error", err, "retry_in", backoff)
			if w.OnError != nil {
				w.OnError(err)
			}
			if !sleep(ctx, backoff) {
				return nil
			}
			continue
		case found:
			backoff = 0
			if w.OnBatch != nil {
				w.OnBatch(report)
			}
			continue
		}
		backoff = 0
		poll.Reset(w.PollInterval)
		select {
		case <-ctx.Done():
			return nil
		case <-w.Wake:
		case <-poll.C:
		}
	}
}

func (w *Worker) check() error {
	var errs []error
	if w.PollInterval <= 0 {
		errs = append(errs, fmt.Errorf("worker: the poll interval must be positive, got %v", w.PollInterval))
	}
	if w.Batch.Episodes < 1 {
		errs = append(errs, fmt.Errorf("worker: a batch must take at least one episode, got %d", w.Batch.Episodes))
	}
	if w.Batch.Steps < 0 {
		errs = append(errs, fmt.Errorf("worker: a batch's step bound cannot be negative, got %d", w.Batch.Steps))
	}
	if w.BatchTimeout <= 0 {
		errs = append(errs, fmt.Errorf("worker: the batch timeout must be positive, got %v", w.BatchTimeout))
	}
	return errors.Join(errs...)
}

func sleep(ctx context.Context, d time.Duration) bool {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
		return false
	case <-t.C:
		return true
	}
}
