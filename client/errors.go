package client

import (
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"strconv"
	"strings"
	"time"
)

// Error is an answer of the service other than 2xx, after any retries.
type Error struct {
	Method, Path string
	StatusCode   int
	// Problem is the problem JSON the service answered with; when the
	// answer was not problem JSON its Title is the status phrase and its
	// Detail the start of the body.
	Problem Problem
	// RetryAfter is the answer's Retry-After (0 when absent).
	RetryAfter time.Duration
}

// Problem is an API problem (RFC 9457 problem details, with qtally's list
// of what is wrong where).
type Problem struct {
	// Type names the kind of problem: a URI of docs/problems.md, '#' and
	// a name (Name returns it), or about:blank for a plain HTTP status.
	Type   string         `json:"type"`
	Title  string         `json:"title"`
	Status int            `json:"status"`
	Detail string         `json:"detail,omitempty"`
	Errors []FieldProblem `json:"errors,omitempty"`
}

// FieldProblem is one thing wrong with a request: where (episode and step
// index within the batch, field) and what.
type FieldProblem struct {
	Episode *int   `json:"episode,omitempty"`
	Step    *int   `json:"step,omitempty"`
	Field   string `json:"field,omitempty"`
	Message string `json:"message"`
}

// Problem names of the service's own problem types (docs/problems.md).
const (
	ProblemInvalidInput    = "invalid-input"
	ProblemNotFound        = "not-found"
	ProblemConflict        = "conflict"
	ProblemUnauthenticated = "unauthenticated"
	ProblemForbidden       = "forbidden"
	ProblemUnavailable     = "unavailable"
	ProblemQuotaExceeded   = "quota-exceeded"
	// ProblemPreconditionFailed: the If-Match sent does not match the
	// policy's settings any more (they changed since they were read).
	ProblemPreconditionFailed = "precondition-failed"
	// ProblemPreconditionRequired: replacing an existing policy's
	// settings needs an If-Match.
	ProblemPreconditionRequired = "precondition-required"
	// ProblemNoGreedyAnswer: greedy has no answer in the state, as no
	// allowed action was tried enough there and the policy has no
	// greedy_fallback.
	ProblemNoGreedyAnswer = "no-greedy-answer"
)

// Name is the problem type's name after '#', such as "invalid-input"; ""
// for about:blank.
func (p Problem) Name() string {
	_, name, _ := strings.Cut(p.Type, "#")
	return name
}

// Where says where a field problem is, such as "episode 3, step 0, reward".
func (f FieldProblem) Where() string {
	var parts []string
	if f.Episode != nil {
		parts = append(parts, "episode "+strconv.Itoa(*f.Episode))
	}
	if f.Step != nil {
		parts = append(parts, "step "+strconv.Itoa(*f.Step))
	}
	if f.Field != "" {
		parts = append(parts, f.Field)
	}
	return strings.Join(parts, ", ")
}

// shownProblems is how many field problems Error() lists; all are in
// Problem.Errors.
const shownProblems = 5

func (e *Error) Error() string {
	var b strings.Builder
	fmt.Fprintf(&b, "%s %s: %d %s", e.Method, e.Path, e.StatusCode, e.Problem.Title)
	if e.Problem.Detail != "" {
		b.WriteString(": " + e.Problem.Detail)
	}
	for i, f := range e.Problem.Errors {
		if i == shownProblems {
			fmt.Fprintf(&b, "\n  ... %d more", len(e.Problem.Errors)-i)
			break
		}
		b.WriteString("\n  ")
		if w := f.Where(); w != "" {
			b.WriteString(w + ": ")
		}
		b.WriteString(f.Message)
	}
	return b.String()
}

// StatusOf is the HTTP status of an *Error in err's chain, or 0.
func StatusOf(err error) int {
	var e *Error
	if errors.As(err, &e) {
		return e.StatusCode
	}
	return 0
}

// ProblemOf is the problem name (such as ProblemConflict) of an *Error in
// err's chain, or "".
func ProblemOf(err error) string {
	var e *Error
	if errors.As(err, &e) {
		return e.Problem.Name()
	}
	return ""
}

func newError(method, path string, resp *http.Response, body []byte) *Error {
	e := &Error{Method: method, Path: path, StatusCode: resp.StatusCode, RetryAfter: parseRetryAfter(resp.Header.Get("Retry-After"), time.Now())}
	if json.Unmarshal(body, &e.Problem) != nil || e.Problem.Title == "" {
		e.Problem = Problem{Type: "about:blank", Title: http.StatusText(resp.StatusCode), Status: resp.StatusCode,
			Detail: strings.TrimSpace(string(body[:min(len(body), 200)]))}
	}
	return e
}

// parseRetryAfter reads Retry-After as seconds or an HTTP date (RFC 9110,
// section 10.2.3); 0 when absent or unreadable.
func parseRetryAfter(h string, now time.Time) time.Duration {
	h = strings.TrimSpace(h)
	if h == "" {
		return 0
	}
	if s, err := strconv.ParseInt(h, 10, 64); err == nil {
		if s < 0 {
			return 0
		}
		return time.Duration(min(s, 1<<31)) * time.Second
	}
	if t, err := http.ParseTime(h); err == nil && t.After(now) {
		return t.Sub(now)
	}
	return 0
}
