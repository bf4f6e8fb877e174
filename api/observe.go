package api

import (
	"log/slog"
	"net/http"
	"sync"
	"time"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/internal/metrics"
)

// methodLabels are the methods a request is counted under; any other
// method, which a client without a token may make up, counts as "other".
var methodLabels = map[string]bool{
	http.MethodGet: true, http.MethodHead: true, http.MethodPost: true, http.MethodPut: true,
	http.MethodPatch: true, http.MethodDelete: true, http.MethodOptions: true,
}

// observe is the outermost middleware of every request: it gives the
// request its id, turns a panic into an error (callRecovering), answers
// any error the handler returned (so that what it
// records is what was sent), and records the request in the latency
// histogram and the request log line. The histogram's labels come from
// fixed sets only: the route pattern (or "unmatched"), a known method (or
// "other") and the status code. Requests arrive before authentication, so
// a label taken from the request itself would let anyone grow the series
// without bound; the log line uses the same route and method.
func observe(m *metrics.Metrics, logger *slog.Logger, types problemTypes, e *echo.Echo) echo.MiddlewareFunc {
	var routes map[string]bool
	var learnRoutes sync.Once
	return func(next echo.HandlerFunc) echo.HandlerFunc {
		return func(c echo.Context) error {
			start := time.Now()
			line := requestLine{id: assignRequestID(c)}
			rc := wrapRequest(c)
			err := callRecovering(next, rc)
			if err != nil {
				c.Error(err)
			}
			// Routes are all added before the server takes its first request.
			learnRoutes.Do(func() {
				routes = map[string]bool{}
				for _, r := range e.Routes() {
					routes[r.Path] = true
				}
			})
			line.route = c.Path()
			if !routes[line.route] {
				line.route = "unmatched"
			}
			line.method = c.Request().Method
			if !methodLabels[line.method] {
				line.method = "other"
			}
			res := c.Response()
			line.status, line.bytes, line.elapsed = res.Status, res.Size, time.Since(start)
			// An error after the answer was committed still fails the request.
			if err != nil && types.toProblem(err).Status >= http.StatusInternalServerError {
				line.failure = err
			}
			m.ObserveRequest(line.route, line.method, line.status, line.elapsed)
			line.log(c.Request().Context(), logger)
			rc.release()
			return nil
		}
	}
}
