package storage

import (
	"context"
	"sync"
	"time"
)

// GroupCommit shapes how requests that each need a durable write are
// committed together.
type GroupCommit struct {
	// MaxBatch bounds the requests of one commit.
	MaxBatch int
	// InFlight bounds the commits under way at once.
	InFlight int
	// Window: with commits under way but fewer than InFlight, a batch goes
	// once its first request has waited this long (0: at once). With no
	// commit under way it goes at once; with InFlight under way it waits
	// for one to end (or for the batch to fill).
	Window time.Duration
}

// groupCommitter gathers requests and hands them to commit in batches, as
// its GroupCommit says. commit must settle every request of its batch.
type groupCommitter[P any] struct {
	window   time.Duration
	maxBatch int
	inFlight int
	queue    chan P
	stopped  chan struct{}
	commit   func(ctx context.Context, batch []P)
}

func newGroupCommitter[P any](cfg GroupCommit, commit func(context.Context, []P)) *groupCommitter[P] {
	return &groupCommitter[P]{window: cfg.Window, maxBatch: cfg.MaxBatch, inFlight: max(cfg.InFlight, 1),
		queue: make(chan P, 4*cfg.MaxBatch), stopped: make(chan struct{}), commit: commit}
}

// await queues p and waits until done closes (its batch was committed or
// failed), ctx ends, or the committer stops (then it returns stopped).
func (g *groupCommitter[P]) await(ctx context.Context, p P, done <-chan struct{}, stopped error) error {
	select {
	case g.queue <- p:
	case <-g.stopped:
		return stopped
	case <-ctx.Done():
		return ctx.Err()
	}
	select {
	case <-done:
		return nil
	case <-g.stopped:
		return stopped
	case <-ctx.Done():
		return ctx.Err()
	}
}

// run gathers and commits batches until ctx ends. It runs until after the
// HTTP server has stopped, so requests in flight get their commit.
//
// A request that arrives while no commit is under way goes at once, alone:
// there is nothing to wait for. Requests that arrive while commits are
// under way gather into the next batch, which goes when a commit ends (or,
// with a free slot, once it is full or its first request has waited the
// window), so the batch size follows the load: one request a commit when
// idle, a commit's worth of arrivals under load.
func (g *groupCommitter[P]) run(ctx context.Context) error {
	defer close(g.stopped)
	ended := make(chan struct{}, g.inFlight)
	inFlight := 0
	var committing sync.WaitGroup
	defer committing.Wait()
	var batch []P
	var since time.Time
	timer := time.NewTimer(time.Hour)
	timer.Stop()
	timerSet := false
	send := func() {
		if timerSet {
			timer.Stop()
			timerSet = false
		}
		inFlight++
		sent := batch
		committing.Go(func() {
			g.commit(ctx, sent)
			ended <- struct{}{}
		})
		batch = nil
	}
	for {
		if len(batch) > 0 && inFlight < g.inFlight {
			waited := time.Since(since)
			switch {
			case inFlight == 0, len(batch) >= g.maxBatch, waited >= g.window:
				send()
			case !timerSet:
				timer.Reset(g.window - waited)
				timerSet = true
			}
		}
		queue := g.queue
		if len(batch) >= g.maxBatch {
			queue = nil
		}
		select {
		case <-ctx.Done():
			if len(batch) > 0 {
				// Gathered requests are waiting for their commit.
				g.commit(ctx, batch)
			}
			return nil
		case p := <-queue:
			if len(batch) == 0 {
				since = time.Now()
			}
			batch = append(batch, p)
		case <-ended:
			inFlight--
		case <-timer.C:
			timerSet = false
		}
	}
}

// policyBatcher gathers requests on open episodes and applies each
// policy's together (apply: one transaction, which sets each request's
// result or error, or fails them all by returning an error), then answers
// each request.
type policyBatcher[Req, Res any] struct {
	group   *groupCommitter[*pendingOn[Req, Res]]
	apply   func(ctx context.Context, policy string, group []*pendingOn[Req, Res]) error
	stopped error
}

// pendingOn is one request waiting in a policyBatcher.
type pendingOn[Req, Res any] struct {
	policy, episode string
	req             Req
	res             Res
	err             error
	done            chan struct{}
}

// batchTimeout bounds one batch's transaction.
const batchTimeout = 10 * time.Second

func newPolicyBatcher[Req, Res any](cfg GroupCommit, stopped error,
	apply func(ctx context.Context, policy string, group []*pendingOn[Req, Res]) error) *policyBatcher[Req, Res] {
	b := &policyBatcher[Req, Res]{apply: apply, stopped: stopped}
	b.group = newGroupCommitter(cfg, b.commit)
	return b
}

// Run gathers and commits batches until ctx ends.
func (b *policyBatcher[Req, Res]) Run(ctx context.Context) error { return b.group.run(ctx) }

func (b *policyBatcher[Req, Res]) submit(ctx context.Context, policy, episode string, req Req) (Res, error) {
	p := &pendingOn[Req, Res]{policy: policy, episode: episode, req: req, done: make(chan struct{})}
	if err := b.group.await(ctx, p, p.done, b.stopped); err != nil {
		var none Res
		return none, err
	}
	return p.res, p.err
}

// commit applies a batch, one transaction per policy (no transaction spans
// policies), and wakes every request of it.
func (b *policyBatcher[Req, Res]) commit(ctx context.Context, batch []*pendingOn[Req, Res]) {
	ctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), batchTimeout)
	defer cancel()
	byPolicy := map[string][]*pendingOn[Req, Res]{}
	for _, p := range batch {
		byPolicy[p.policy] = append(byPolicy[p.policy], p)
	}
	var wg sync.WaitGroup
	for policy, group := range byPolicy {
		wg.Go(func() {
			if err := b.apply(ctx, policy, group); err != nil {
				for _, p := range group {
					p.err = err
				}
			}
		})
	}
	wg.Wait()
	for _, p := range batch {
		close(p.done)
	}
}
