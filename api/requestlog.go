package api

import (
	"context"
	"encoding/hex"
	"errors"
	"fmt"
	"log/slog"
	"math/rand/v2"
	"net/http"
	"runtime/debug"
	"time"

	"github.com/labstack/echo/v4"
)

// headerRequestID carries a request's id both ways: a client or a proxy
// may name the request, and every answer names it.
const headerRequestID = "X-Request-Id"

// maxRequestIDLength bounds an id taken from a request.
const maxRequestIDLength = 128

// slowRequest is the time past which a request's log line is written at
// warning level, so that it shows at the default level.
const slowRequest = time.Second

// Log keys of the request log line, spelled as everywhere else (see
// DEVELOPERS.md).
const (
	logKeyRequestID = "request_id"
	logKeyMethod    = "method"
	logKeyRoute     = "route"
	logKeyStatus    = "status"
	logKeyDuration  = "duration"
	logKeyBytes     = "bytes"
	logKeyError     = "error"
	logKeyStack     = "stack"
)

// assignRequestID takes the request's id from its header when that is a
// sane one, else makes one, and puts it in the answer's header, where the
// error handler and the log lines read it back.
func assignRequestID(c echo.Context) string {
	// The name is canonical already: no Set, which would canonicalise it
	// again, and a sane id's slice is shared rather than copied.
	if v := c.Request().Header[headerRequestID]; len(v) == 1 && saneRequestID(v[0]) {
		c.Response().Header()[headerRequestID] = v
		return v[0]
	}
	id := newRequestID()
	c.Response().Header()[headerRequestID] = []string{id}
	return id
}

// requestID is the id assignRequestID gave the request ("" outside it).
func requestID(c echo.Context) string {
	if v := c.Response().Header()[headerRequestID]; len(v) > 0 {
		return v[0]
	}
	return ""
}

// saneRequestID accepts what is safe to echo in a header and a log line:
// letters, digits and a few marks used by common id formats (UUIDs, base64,
// trace ids), at most maxRequestIDLength of them.
func saneRequestID(s string) bool {
	if s == "" || len(s) > maxRequestIDLength {
		return false
	}
	for i := 0; i < len(s); i++ {
		switch b := s[i]; {
		case 'a' <= b && b <= 'z', 'A' <= b && b <= 'Z', '0' <= b && b <= '9':
		case b == '-', b == '_', b == '.', b == ':', b == '+', b == '/', b == '=', b == '@':
		default:
			return false
		}
	}
	return true
}

// newRequestID makes 128 random bits into 32 hex digits. The runtime's
// per-thread generator is enough: an id names a request in logs, it
// guards nothing.
func newRequestID() string {
	var raw [16]byte
	for i, v := range [2]uint64{rand.Uint64(), rand.Uint64()} {
		for j := range 8 {
			raw[i*8+j] = byte(v >> (8 * j))
		}
	}
	var out [32]byte
	hex.Encode(out[:], raw[:])
	return string(out[:])
}

// panicError is a handler's panic, turned into an error that answers 500.
type panicError struct {
	value any
	stack []byte
}

func (p *panicError) Error() string { return fmt.Sprintf("panic: %v", p.value) }

// callRecovering calls next and turns its panic into a *panicError, which
// observe answers with 500 problem JSON (instead of dropping the
// connection) and logs once, with its stack. A panic with
// http.ErrAbortHandler still aborts the answer, as net/http intends. It is
// a plain call rather than a middleware of its own because echo builds the
// middleware chain for every request: each middleware costs an allocation.
func callRecovering(next echo.HandlerFunc, c echo.Context) (err error) {
	defer func() {
		if v := recover(); v != nil {
			if v == http.ErrAbortHandler { //nolint:errorlint // recover yields the very value panicked with; net/http compares it the same way
				panic(v)
			}
			err = &panicError{value: v, stack: debug.Stack()}
		}
	}()
	return next(c)
}

// requestLine is what the request log line says.
type requestLine struct {
	id, method, route string
	status            int
	elapsed           time.Duration
	bytes             int64
	// failure is the error of a request the server failed (5xx), else nil.
	failure error
}

// level keeps the line out of the log unless it matters: a failed request
// is an error, a slow one a warning, any other only shows at debug level
// (scrapes of /metrics and /livez, and choose at thousands a second, would
// flood the log otherwise).
func (r requestLine) level() slog.Level {
	switch {
	case r.failure != nil || r.status >= http.StatusInternalServerError:
		return slog.LevelError
	case r.elapsed >= slowRequest:
		return slog.LevelWarn
	default:
		return slog.LevelDebug
	}
}

// log writes the line; a line its level leaves out costs one check.
func (r requestLine) log(ctx context.Context, logger *slog.Logger) {
	level := r.level()
	if !logger.Enabled(ctx, level) {
		return
	}
	attrs := []slog.Attr{slog.String(logKeyRequestID, r.id), slog.String(logKeyMethod, r.method),
		slog.String(logKeyRoute, r.route), slog.Int(logKeyStatus, r.status),
		slog.Duration(logKeyDuration, r.elapsed), slog.Int64(logKeyBytes, r.bytes)}
	if r.failure != nil {
		attrs = append(attrs, slog.String(logKeyError, r.failure.Error()))
		if p := (*panicError)(nil); errors.As(r.failure, &p) {
			attrs = append(attrs, slog.String(logKeyStack, string(p.stack)))
		}
	}
	logger.LogAttrs(ctx, level, "request", attrs...)
}
