package api

import (
	"net/http"
	"strconv"
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

// observe records each request's latency with labels from fixed sets only:
// the route pattern (or "unmatched"), a known method (or "other") and the
// status code. Requests arrive before authentication, so a label taken from
// the request itself would let anyone grow the series without bound.
func observe(m *metrics.Metrics, e *echo.Echo) echo.MiddlewareFunc {
	var routes map[string]bool
	var learnRoutes sync.Once
	return func(next echo.HandlerFunc) echo.HandlerFunc {
		return func(c echo.Context) error {
			start := time.Now()
			err := next(c)
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
			route := c.Path()
			if !routes[route] {
				route = "unmatched"
			}
			method := c.Request().Method
			if !methodLabels[method] {
				method = "other"
			}
			m.HTTPDuration.WithLabelValues(route, method, strconv.Itoa(c.Response().Status)).
				Observe(time.Since(start).Seconds())
			return nil
		}
	}
}
