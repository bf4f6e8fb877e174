package api

import (
	"net/http"
	"time"

	"github.com/labstack/echo/v4"
)

// bulkDeadline gives an authorised request that carries an episode batch or
// a whole table d to be read and answered, instead of the server's short
// read and write timeouts, which stay in force for everyone else (a client
// without a token cannot hold a connection this long).
func bulkDeadline(d time.Duration) echo.MiddlewareFunc {
	return func(next echo.HandlerFunc) echo.HandlerFunc {
		return func(c echo.Context) error {
			rc := http.NewResponseController(c.Response())
			deadline := time.Now().Add(d)
			// Errors mean the connection cannot take deadlines (HTTP/2 in
			// tests, say); the server's own timeouts then stay.
			_ = rc.SetReadDeadline(deadline)
			_ = rc.SetWriteDeadline(deadline)
			return next(c)
		}
	}
}
