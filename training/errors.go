package training

import (
	"errors"
	"fmt"
	"strings"
)

// Domain errors; the HTTP layer maps each to one status.
var (
	ErrNotFound    = errors.New("not found")
	ErrConflict    = errors.New("conflict")
	ErrUnavailable = errors.New("temporarily unavailable")
	// ErrUnauthenticated: the request carries no valid token.
	ErrUnauthenticated = errors.New("unauthenticated")
	// ErrForbidden: the token may not do what the request asks.
	ErrForbidden = errors.New("forbidden")
	// ErrQuota: the request would take a policy or the service past a
	// configured limit.
	ErrQuota = errors.New("quota exceeded")
)

// Quotaf returns an error that is ErrQuota with the given message.
func Quotaf(format string, args ...any) error {
	return &kindError{ErrQuota, fmt.Sprintf(format, args...)}
}

// QuotaError is a request refused for a quota, with where in the request
// each item beyond it is.
type QuotaError struct {
	Detail   string
	Problems []FieldError
}

func (e *QuotaError) Error() string { return e.Detail }
func (e *QuotaError) Unwrap() error { return ErrQuota }

// kindError is a domain error with a message fit to show a client.
type kindError struct {
	kind error
	msg  string
}

func (e *kindError) Error() string { return e.msg }
func (e *kindError) Unwrap() error { return e.kind }

// NotFoundf returns an error that is ErrNotFound with the given message.
func NotFoundf(format string, args ...any) error {
	return &kindError{ErrNotFound, fmt.Sprintf(format, args...)}
}

// Conflictf returns an error that is ErrConflict with the given message.
func Conflictf(format string, args ...any) error {
	return &kindError{ErrConflict, fmt.Sprintf(format, args...)}
}

// Unavailablef returns an error that is ErrUnavailable with the given message.
func Unavailablef(format string, args ...any) error {
	return &kindError{ErrUnavailable, fmt.Sprintf(format, args...)}
}

// Unauthenticatedf returns an error that is ErrUnauthenticated with the given message.
func Unauthenticatedf(format string, args ...any) error {
	return &kindError{ErrUnauthenticated, fmt.Sprintf(format, args...)}
}

// Forbiddenf returns an error that is ErrForbidden with the given message.
func Forbiddenf(format string, args ...any) error {
	return &kindError{ErrForbidden, fmt.Sprintf(format, args...)}
}

// FieldError locates one problem in a request: the episode and step it is
// in (-1 where not applicable) and the JSON field.
type FieldError struct {
	Episode int    `json:"episode"`
	Step    int    `json:"step"`
	Field   string `json:"field"`
	Message string `json:"message"`
}

func (e FieldError) String() string {
	var where []string
	if e.Episode >= 0 {
		where = append(where, fmt.Sprintf("episode %d", e.Episode))
	}
	if e.Step >= 0 {
		where = append(where, fmt.Sprintf("step %d", e.Step))
	}
	if e.Field != "" {
		where = append(where, e.Field)
	}
	if len(where) == 0 {
		return e.Message
	}
	return strings.Join(where, ", ") + ": " + e.Message
}

// ValidationError is a refused request with every problem found in it.
type ValidationError struct {
	Problems []FieldError
}

func (e *ValidationError) Error() string {
	if len(e.Problems) == 1 {
		return "invalid input: " + e.Problems[0].String()
	}
	return fmt.Sprintf("invalid input: %d problems, first: %s", len(e.Problems), e.Problems[0].String())
}

// maxReportedProblems bounds the error list so a hostile batch cannot make
// the answer larger than the request.
const maxReportedProblems = 100

type problemList struct {
	problems []FieldError
	dropped  int
}

func (l *problemList) add(episode, step int, field, format string, args ...any) {
	if len(l.problems) >= maxReportedProblems {
		l.dropped++
		return
	}
	l.problems = append(l.problems, FieldError{Episode: episode, Step: step, Field: field, Message: fmt.Sprintf(format, args...)})
}

func (l *problemList) err() error {
	if len(l.problems) == 0 {
		return nil
	}
	if l.dropped > 0 {
		l.problems = append(l.problems, FieldError{Episode: -1, Step: -1, Message: fmt.Sprintf("%d more problems not listed", l.dropped)})
	}
	return &ValidationError{Problems: l.problems}
}

// Refuse returns a ValidationError listing problems, bounded as every
// refusal is; nil when there are none.
func Refuse(problems []FieldError) error {
	var l problemList
	for _, p := range problems {
		l.add(p.Episode, p.Step, p.Field, "%s", p.Message)
	}
	return l.err()
}

// Invalid returns a ValidationError with a single problem.
func Invalid(episode, step int, field, format string, args ...any) error {
	var l problemList
	l.add(episode, step, field, format, args...)
	return l.err()
}
