package client

import (
	"context"
	"errors"
	"fmt"
	"net/http"
	"sync"
	"time"
)

// RecorderOptions shape a Recorder. Zero fields take the defaults.
type RecorderOptions struct {
	// BatchSize is the most episodes one POST carries; 0 means 100.
	BatchSize int
	// FlushInterval is the longest a finished episode waits for its batch
	// to fill before it is posted anyway; 0 means 1 s.
	FlushInterval time.Duration
	// QueueSize is how many finished episodes may wait for the sender; 0
	// means 10 batches. With the batch being posted, the recorder holds at
	// most QueueSize + BatchSize finished episodes: its memory is bounded.
	QueueSize int
	// NoWait makes End return ErrQueueFull at once when the queue is full,
	// instead of waiting for room (for an application that would rather
	// lose an episode than a request's time).
	NoWait bool
	// OnPosted, when set, is called from the sender after each batch the
	// service answered, with the batch and the answer.
	OnPosted func([]Episode, IngestResult)
	// OnError, when set, is called from the sender with each batch that
	// was dropped, and why: one the service refused (an invalid batch would
	// never be taken), or one still unposted when Close's context ended.
	// Err keeps the first such error. A batch the service cannot take for
	// now (429, 503, no connection) is not dropped: the sender keeps trying,
	// and meanwhile the queue fills and End waits or refuses.
	OnError func([]Episode, error)
}

// ErrQueueFull is End's answer when RecorderOptions.NoWait is set and the
// queue of finished episodes is full: the service is not keeping up (or
// not reachable) and the episode was not kept.
var ErrQueueFull = errors.New("qtally recorder: queue of finished episodes is full")

// ErrClosed is End's answer once Close has begun: an End waiting for room
// when Close is called gets it too, and its episode is not kept.
var ErrClosed = errors.New("qtally recorder: closed")

// Recorder collects episodes step by step as an application runs them and
// posts the finished ones in batches from a background goroutine. Each
// step is recorded from the Choice that chose it, so the logged state,
// action, probability and allowed set are exactly the service's. Posts
// are repeated with the same episode ids, so no episode is stored twice.
// Safe for concurrent use; each Recording belongs to one goroutine.
type Recorder struct {
	c      *Client
	policy string
	opts   RecorderOptions
	queue  chan queued
	done   chan struct{}
	// ctx ends the sender's posts when Close's context ends first.
	ctx    context.Context
	cancel context.CancelFunc

	mu     sync.RWMutex // held for reading while End sends, for writing to close
	closed bool
	// closing ends the waits of End and Flush for room in the queue once
	// Close has begun, so that Close gets mu at once.
	closing   chan struct{}
	closeOnce sync.Once

	statsMu sync.Mutex
	stats   RecorderStats
	err     error
}

// RecorderStats count what a Recorder did.
type RecorderStats struct {
	// Ended is the episodes End took in.
	Ended int64
	// Posts is the POST requests answered 202 (retries not counted).
	Posts int64
	// Accepted and Duplicates sum the service's answers.
	Accepted, Duplicates int64
	// Dropped is the episodes of batches that could not be posted.
	Dropped int64
	// Refused is End calls turned away with ErrQueueFull.
	Refused int64
	// Queued is the finished episodes waiting in the queue now, and
	// Posting those the sender holds (its batch): together at most
	// QueueSize + BatchSize.
	Queued, Posting int
}

// queued is an item of the sender's queue: a finished episode, or a
// request to post what it has (and, with stop, to end).
type queued struct {
	episode Episode
	flushed chan<- struct{}
	stop    bool
}

// NewRecorder starts a recorder posting to policy. Close it when done.
func (c *Client) NewRecorder(policy string, opts RecorderOptions) *Recorder {
	if opts.BatchSize <= 0 {
		opts.BatchSize = 100
	}
	if opts.FlushInterval <= 0 {
		opts.FlushInterval = time.Second
	}
	if opts.QueueSize <= 0 {
		opts.QueueSize = 10 * opts.BatchSize
	}
	r := &Recorder{c: c, policy: policy, opts: opts, queue: make(chan queued, opts.QueueSize),
		done: make(chan struct{}), closing: make(chan struct{})}
	r.ctx, r.cancel = context.WithCancel(context.Background())
	go r.send()
	return r
}

// Recording is one episode being recorded.
type Recording struct {
	r     *Recorder
	ep    Episode
	err   error
	ended bool
}

// Start begins an episode. id must be unique within the policy and the
// same if the application ever records this episode again: the service
// keeps the first episode posted under an id.
func (r *Recorder) Start(id string) *Recording {
	rec := &Recording{r: r, ep: Episode{ID: id}}
	if id == "" {
		rec.err = errors.New("qtally recorder: an episode needs an id")
	}
	return rec
}

// Step records the action the service chose, copied from its answer with
// the state it was asked about, the probability it gave and the set it
// chose from. Add the reward that followed with Reward.
func (rec *Recording) Step(ch Choice) {
	if rec.err != nil {
		return
	}
	if ch.State == "" || ch.Action == "" {
		rec.err = fmt.Errorf("qtally recorder: episode %q step %d: the choice has no state or action; record what Client.Choose returned", rec.ep.ID, len(rec.ep.Steps))
		return
	}
	rec.ep.Steps = append(rec.ep.Steps, Step{State: ch.State, Action: ch.Action, Probability: ch.Probability,
		Allowed: append([]string(nil), ch.Allowed...)})
}

// Reward adds to the reward of the latest step: rewards that arrive in
// parts (a payment, then a fee) add up.
func (rec *Recording) Reward(x float64) {
	if rec.err != nil {
		return
	}
	if len(rec.ep.Steps) == 0 {
		rec.err = fmt.Errorf("qtally recorder: episode %q: a reward before the first step", rec.ep.ID)
		return
	}
	rec.ep.Steps[len(rec.ep.Steps)-1].Reward += x
}

// Episode is the episode as recorded so far.
func (rec *Recording) Episode() Episode { return rec.ep }

// End finishes the episode and queues it for posting. When the queue is
// full it waits for room until ctx ends, or with NoWait returns
// ErrQueueFull; in both cases the episode is not kept. An episode without
// steps, or with a recording error, is refused with that error.
func (rec *Recording) End(ctx context.Context) error {
	switch {
	case rec.ended:
		return fmt.Errorf("qtally recorder: episode %q ended twice", rec.ep.ID)
	case rec.err != nil:
		return rec.err
	case len(rec.ep.Steps) == 0:
		return fmt.Errorf("qtally recorder: episode %q has no steps", rec.ep.ID)
	}
	rec.ended = true
	r := rec.r
	r.mu.RLock()
	defer r.mu.RUnlock()
	if r.closed {
		return ErrClosed
	}
	item := queued{episode: rec.ep}
	if r.opts.NoWait {
		select {
		case r.queue <- item:
		default:
			r.count(func(s *RecorderStats) { s.Refused++ })
			return ErrQueueFull
		}
	} else {
		select {
		case r.queue <- item:
		case <-ctx.Done():
			return fmt.Errorf("qtally recorder: episode %q not kept: %w", rec.ep.ID, ctx.Err())
		case <-r.closing:
			return ErrClosed
		}
	}
	r.count(func(s *RecorderStats) { s.Ended++ })
	return nil
}

// Flush posts every episode ended before it and returns when they are
// posted (or dropped; see Err), or when ctx ends.
func (r *Recorder) Flush(ctx context.Context) error {
	r.mu.RLock()
	defer r.mu.RUnlock()
	if r.closed {
		return ErrClosed
	}
	return r.mark(ctx)
}

// Close posts what is queued, stops the sender and returns the first
// error of a dropped batch, if any. If ctx ends first, what is still
// unposted is dropped (and counted) and Close returns ctx's error.
func (r *Recorder) Close(ctx context.Context) error {
	r.closeOnce.Do(func() { close(r.closing) })
	r.mu.Lock()
	if r.closed {
		r.mu.Unlock()
		<-r.done
		return r.Err()
	}
	r.closed = true
	r.mu.Unlock()
	stopped := make(chan struct{})
	go func() {
		// No End sends any more: the stop request is the queue's last item.
		r.queue <- queued{flushed: stopped, stop: true}
	}()
	select {
	case <-r.done:
		r.cancel()
		return r.Err()
	case <-ctx.Done():
		r.cancel()
		<-r.done
		return ctx.Err()
	}
}

// mark queues a flush request behind the episodes already queued and
// waits for the sender to reach it.
func (r *Recorder) mark(ctx context.Context) error {
	flushed := make(chan struct{})
	select {
	case r.queue <- queued{flushed: flushed}:
	case <-ctx.Done():
		return ctx.Err()
	case <-r.closing:
		return ErrClosed
	}
	select {
	case <-flushed:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}

// Err is the first error of a batch that could not be posted.
func (r *Recorder) Err() error {
	r.statsMu.Lock()
	defer r.statsMu.Unlock()
	return r.err
}

// Stats returns the recorder's counts so far.
func (r *Recorder) Stats() RecorderStats {
	r.statsMu.Lock()
	defer r.statsMu.Unlock()
	st := r.stats
	st.Queued = len(r.queue)
	return st
}

func (r *Recorder) count(f func(*RecorderStats)) {
	r.statsMu.Lock()
	defer r.statsMu.Unlock()
	f(&r.stats)
}

// unavailable says err is the service not taking requests for now (429,
// 503, or no answer), not a refusal of the batch.
func unavailable(err error) bool {
	var e *Error
	if errors.As(err, &e) {
		return e.StatusCode == http.StatusTooManyRequests || e.StatusCode == http.StatusServiceUnavailable
	}
	return !errors.Is(err, errBody)
}

// send is the background sender: it fills a batch from the queue and
// posts it when full, when the oldest episode in it has waited
// FlushInterval, or when asked to flush. While a batch is being posted it
// takes nothing from the queue, so the queue's bound holds.
func (r *Recorder) send() {
	defer close(r.done)
	batch := make([]Episode, 0, r.opts.BatchSize)
	timer := time.NewTimer(r.opts.FlushInterval)
	timer.Stop()
	post := func() {
		timer.Stop()
		if len(batch) == 0 {
			return
		}
		res, err := r.c.PostEpisodes(r.ctx, r.policy, batch)
		for err != nil && r.ctx.Err() == nil && unavailable(err) {
			// The client's retries ran out while the service cannot take
			// the batch for now: keep it, and try again after a pause.
			if sleep(r.ctx, r.c.opts.Retry.MaxDelay) != nil {
				break
			}
			res, err = r.c.PostEpisodes(r.ctx, r.policy, batch)
		}
		if err != nil {
			r.count(func(s *RecorderStats) {
				s.Dropped += int64(len(batch))
				if r.err == nil {
					r.err = fmt.Errorf("qtally recorder: %d episodes dropped: %w", len(batch), err)
				}
			})
			if r.opts.OnError != nil {
				r.opts.OnError(batch, err)
			}
		} else {
			r.count(func(s *RecorderStats) {
				s.Posts++
				s.Accepted += int64(res.Accepted)
				s.Duplicates += int64(res.Duplicates)
			})
			if r.opts.OnPosted != nil {
				r.opts.OnPosted(batch, res)
			}
		}
		batch = make([]Episode, 0, r.opts.BatchSize)
		r.count(func(s *RecorderStats) { s.Posting = 0 })
	}
	for {
		select {
		case item := <-r.queue:
			if item.flushed != nil {
				post()
				close(item.flushed)
				if item.stop {
					return
				}
				continue
			}
			if len(batch) == 0 {
				timer.Reset(r.opts.FlushInterval)
			}
			batch = append(batch, item.episode)
			r.count(func(s *RecorderStats) { s.Posting = len(batch) })
			if len(batch) >= r.opts.BatchSize {
				post()
			}
		case <-timer.C:
			post()
		}
	}
}
