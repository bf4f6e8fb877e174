package api

import (
	"errors"
	"log/slog"
	"net/http"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/training"
)

// Problem is an RFC 9457 problem detail.
type Problem struct {
	Type   string         `json:"type"`
	Title  string         `json:"title"`
	Status int            `json:"status"`
	Detail string         `json:"detail,omitempty"`
	Errors []ProblemField `json:"errors,omitempty"`
	// RequestID names the request in the server's log (and in the
	// X-Request-Id header).
	RequestID string `json:"request_id,omitempty"`
}

// ProblemField locates one problem of an invalid request.
type ProblemField struct {
	Episode *int   `json:"episode,omitempty"`
	Step    *int   `json:"step,omitempty"`
	Field   string `json:"field,omitempty"`
	Message string `json:"message"`
}

const problemContentType = "application/problem+json"

// errorHandler answers every error as problem JSON, with the status its
// domain error calls for. observe logs the request, failures included.
func errorHandler(logger *slog.Logger, types problemTypes) echo.HTTPErrorHandler {
	return func(err error, c echo.Context) {
		if c.Response().Committed {
			return
		}
		p := types.toProblem(err)
		p.RequestID = requestID(c)
		h := c.Response().Header()
		if (p.Status == http.StatusServiceUnavailable || p.Status == http.StatusTooManyRequests) && h.Get("Retry-After") == "" {
			h.Set("Retry-After", "1")
		}
		if p.Status == http.StatusUnauthorized {
			if h.Get(echo.HeaderWWWAuthenticate) == "" {
				h.Set(echo.HeaderWWWAuthenticate, bearerRealm)
			}
			// A client without a valid token gets no idle connection to hold.
			h.Set(echo.HeaderConnection, "close")
		}
		c.Response().Header().Set(echo.HeaderContentType, problemContentType)
		c.Response().WriteHeader(p.Status)
		if c.Request().Method == http.MethodHead {
			return
		}
		if err := jsonEncode(c.Response(), p); err != nil {
			logger.Warn("writing problem", logKeyRequestID, p.RequestID, logKeyRoute, c.Path(), logKeyError, err)
		}
	}
}

func (pt problemTypes) toProblem(err error) Problem {
	var verr *training.ValidationError
	var qerr *training.QuotaError
	var herr *echo.HTTPError
	switch {
	case errors.As(err, &verr):
		p := pt.problem(problemInvalidInput, verr.Error())
		p.Errors = problemFields(verr.Problems)
		return p
	case errors.As(err, &qerr):
		p := pt.problem(problemQuotaExceeded, qerr.Error())
		p.Errors = problemFields(qerr.Problems)
		return p
	case errors.Is(err, training.ErrQuota):
		return pt.problem(problemQuotaExceeded, err.Error())
	case errors.Is(err, training.ErrNotFound):
		return pt.problem(problemNotFound, err.Error())
	case errors.Is(err, training.ErrConflict):
		return pt.problem(problemConflict, err.Error())
	case errors.Is(err, training.ErrNoAnswer):
		return pt.problem(problemNoGreedyAnswer, err.Error())
	case errors.Is(err, training.ErrPreconditionFailed):
		return pt.problem(problemPreconditionFailed, err.Error())
	case errors.Is(err, training.ErrPreconditionRequired):
		return pt.problem(problemPreconditionRequired, err.Error())
	case errors.Is(err, training.ErrUnauthenticated):
		return pt.problem(problemUnauthenticated, err.Error())
	case errors.Is(err, training.ErrForbidden):
		return pt.problem(problemForbidden, err.Error())
	case errors.Is(err, training.ErrUnavailable):
		return pt.problem(problemUnavailable, "the database cannot be reached; retry later")
	case errors.As(err, &herr):
		detail := http.StatusText(herr.Code)
		if msg, ok := herr.Message.(string); ok {
			detail = msg
		}
		return Problem{Type: plainProblemType, Title: http.StatusText(herr.Code), Status: herr.Code, Detail: detail}
	default:
		return Problem{Type: plainProblemType, Title: "Internal Server Error", Status: http.StatusInternalServerError,
			Detail: "the request failed on the server; see its log"}
	}
}

func problemFields(list []training.FieldError) []ProblemField {
	var out []ProblemField
	for _, fe := range list {
		pf := ProblemField{Field: fe.Field, Message: fe.Message}
		if fe.Episode >= 0 {
			pf.Episode = &fe.Episode
		}
		if fe.Step >= 0 {
			pf.Step = &fe.Step
		}
		out = append(out, pf)
	}
	return out
}
