package client

import (
	"math/rand/v2"
	"time"
)

// RetryPolicy says how a Client retries. Zero fields take the defaults.
type RetryPolicy struct {
	// MaxAttempts is how many times one call is sent at most; 0 means 8,
	// 1 turns retrying off.
	MaxAttempts int
	// BaseDelay is the wait before the first retry; each further retry
	// doubles it, up to MaxDelay. 0 means 100 ms; MaxDelay 0 means 10 s.
	BaseDelay, MaxDelay time.Duration
	// MaxRetryAfter is the longest Retry-After the client waits for; a
	// longer one returns the error at once. 0 means 1 minute.
	MaxRetryAfter time.Duration
	// OnRetry, when set, is called before each wait (for logs and metrics).
	OnRetry func(RetryEvent)
}

// RetryEvent describes one retry about to happen.
type RetryEvent struct {
	Method, Path string
	// Attempt is the number of the attempt that failed, from 1.
	Attempt int
	// Status is the failed attempt's HTTP status; 0 when it got no answer.
	Status int
	// RetryAfter is what the answer's Retry-After asked for (0: nothing).
	RetryAfter time.Duration
	// Wait is how long the client waits before the next attempt: never
	// less than RetryAfter.
	Wait time.Duration
	Err  error
}

func (p RetryPolicy) withDefaults() RetryPolicy {
	if p.MaxAttempts <= 0 {
		p.MaxAttempts = 8
	}
	if p.BaseDelay <= 0 {
		p.BaseDelay = 100 * time.Millisecond
	}
	if p.MaxDelay <= 0 {
		p.MaxDelay = 10 * time.Second
	}
	if p.MaxDelay < p.BaseDelay {
		p.MaxDelay = p.BaseDelay
	}
	if p.MaxRetryAfter <= 0 {
		p.MaxRetryAfter = time.Minute
	}
	return p
}

// wait is the pause after failed attempt n: the exponential backoff with
// "equal jitter" (half fixed, half random, so that clients that failed
// together spread out but none retries at once; common practice), and never less than the
// service's Retry-After, which gets a random tenth of a base delay on top
// for the same reason.
func (p RetryPolicy) wait(attempt int, retryAfter time.Duration) time.Duration {
	backoff := p.BaseDelay
	for i := 1; i < attempt && backoff < p.MaxDelay; i++ {
		backoff *= 2
	}
	backoff = min(backoff, p.MaxDelay)
	d := backoff/2 + rand.N(backoff/2+1)
	if retryAfter > 0 {
		d = max(d, retryAfter+rand.N(p.BaseDelay/10+1))
	}
	return d
}
