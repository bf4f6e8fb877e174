package api

import (
	"strconv"
	"time"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/metrics"
)

// observe records each request's latency by route pattern (bounded), never
// by raw path.
func observe(m *metrics.Metrics) echo.MiddlewareFunc {
	return func(next echo.HandlerFunc) echo.HandlerFunc {
		return func(c echo.Context) error {
			start := time.Now()
			err := next(c)
			if err != nil {
				c.Error(err)
			}
			route := c.Path()
			if route == "" {
				route = "unmatched"
			}
			m.HTTPDuration.WithLabelValues(route, c.Request().Method, strconv.Itoa(c.Response().Status)).
				Observe(time.Since(start).Seconds())
			return nil
		}
	}
}
