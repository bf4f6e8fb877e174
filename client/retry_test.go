package client

import (
	"testing"
	"time"
)

// Retry-After is either a number of seconds or an HTTP date (RFC 9110,
// section 10.2.3).
func TestParseRetryAfter(t *testing.T) {
	now := time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)
	for header, want := range map[string]time.Duration{
		"":                              0,
		"3":                             3 * time.Second,
		" 120 ":                         2 * time.Minute,
		"-1":                            0,
		"soon":                          0,
		"Sun, 01 Mar 2026 12:00:30 GMT": 30 * time.Second,
		"Sun, 01 Mar 2026 11:59:00 GMT": 0, // already past
	} {
		if got := parseRetryAfter(header, now); got != want {
			t.Errorf("Retry-After %q: %v, want %v", header, got, want)
		}
	}
}

// The wait doubles per attempt up to MaxDelay, keeps at least half of the
// backoff (equal jitter), and is never shorter than Retry-After.
func TestRetryWait(t *testing.T) {
	p := RetryPolicy{BaseDelay: 100 * time.Millisecond, MaxDelay: time.Second}.withDefaults()
	for attempt, backoff := range map[int]time.Duration{1: 100 * time.Millisecond, 2: 200 * time.Millisecond, 4: 800 * time.Millisecond, 9: time.Second} {
		for range 200 {
			if d := p.wait(attempt, 0); d < backoff/2 || d > backoff {
				t.Fatalf("attempt %d: wait %v outside [%v, %v]", attempt, d, backoff/2, backoff)
			}
			if d := p.wait(attempt, 3*time.Second); d < 3*time.Second || d > 3*time.Second+p.BaseDelay/10 {
				t.Fatalf("attempt %d with Retry-After 3s: wait %v", attempt, d)
			}
		}
	}
}

func TestErrorSaysWhere(t *testing.T) {
	one, two := 1, 2
	e := &Error{Method: "POST", Path: "/v1/policies/p/episodes", StatusCode: 400, Problem: Problem{
		Type: "https://example.test/problems.md#invalid-input", Title: "Invalid input", Status: 400, Detail: "2 problems",
		Errors: []FieldProblem{{Episode: &one, Step: &two, Field: "reward", Message: "must be a number"}, {Field: "episodes", Message: "too many"}}}}
	want := "POST /v1/policies/p/episodes: 400 Invalid input: 2 problems\n  episode 1, step 2, reward: must be a number\n  episodes: too many"
	if e.Error() != want {
		t.Errorf("got\n%s\nwant\n%s", e.Error(), want)
	}
	if e.Problem.Name() != ProblemInvalidInput || StatusOf(e) != 400 || ProblemOf(e) != ProblemInvalidInput {
		t.Errorf("name %q, status %d", e.Problem.Name(), StatusOf(e))
	}
}
