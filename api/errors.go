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
// domain error calls for.
func errorHandler(logger *slog.Logger) echo.HTTPErrorHandler {
	return func(err error, c echo.Context) {
		if c.Response().Committed {
			return
		}
		p := toProblem(err)
		if p.Status >= 500 {
			logger.Error("request failed", "method", c.Request().Method, "path", c.Request().URL.Path, "error", err)
		}
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
			logger.Warn("writing problem", "error", err)
		}
	}
}

func toProblem(err error) Problem {
	var verr *training.ValidationError
	var qerr *training.QuotaError
	var herr *echo.HTTPError
	switch {
	case errors.As(err, &verr):
		return Problem{Type: "urn:qtally:problem:invalid-input", Title: "Invalid input", Status: http.StatusBadRequest, Detail: verr.Error(),
			Errors: problemFields(verr.Problems)}
	case errors.As(err, &qerr):
		return Problem{Type: "urn:qtally:problem:quota-exceeded", Title: "Quota exceeded", Status: http.StatusConflict, Detail: qerr.Error(),
			Errors: problemFields(qerr.Problems)}
	case errors.Is(err, training.ErrQuota):
		return Problem{Type: "urn:qtally:problem:quota-exceeded", Title: "Quota exceeded", Status: http.StatusConflict, Detail: err.Error()}
	case errors.Is(err, training.ErrNotFound):
		return Problem{Type: "urn:qtally:problem:not-found", Title: "Not found", Status: http.StatusNotFound, Detail: err.Error()}
	case errors.Is(err, training.ErrConflict):
		return Problem{Type: "urn:qtally:problem:conflict", Title: "Conflict", Status: http.StatusConflict, Detail: err.Error()}
	case errors.Is(err, training.ErrUnauthenticated):
		return Problem{Type: "urn:qtally:problem:unauthenticated", Title: "Unauthenticated", Status: http.StatusUnauthorized, Detail: err.Error()}
	case errors.Is(err, training.ErrForbidden):
		return Problem{Type: "urn:qtally:problem:forbidden", Title: "Forbidden", Status: http.StatusForbidden, Detail: err.Error()}
	case errors.Is(err, training.ErrUnavailable):
		return Problem{Type: "urn:qtally:problem:unavailable", Title: "Temporarily unavailable", Status: http.StatusServiceUnavailable,
			Detail: "the database cannot be reached; retry later"}
	case errors.As(err, &herr):
		detail := http.StatusText(herr.Code)
		if msg, ok := herr.Message.(string); ok {
			detail = msg
		}
		return Problem{Type: "about:blank", Title: http.StatusText(herr.Code), Status: herr.Code, Detail: detail}
	default:
		return Problem{Type: "about:blank", Title: "Internal Server Error", Status: http.StatusInternalServerError,
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
