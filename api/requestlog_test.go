package api

import (
	"bufio"
	"bytes"
	"encoding/json"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"regexp"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/labstack/echo/v4"
	"github.com/prometheus/client_golang/prometheus"

	"github.com/qtally/qtally/internal/metrics"
)

// logBuffer collects what a server logs, for tests to read back.
type logBuffer struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (b *logBuffer) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.Write(p)
}

func (b *logBuffer) String() string {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.String()
}

// lines are the JSON log lines written so far.
func (b *logBuffer) lines(t *testing.T) []map[string]any {
	t.Helper()
	b.mu.Lock()
	defer b.mu.Unlock()
	var out []map[string]any
	sc := bufio.NewScanner(bytes.NewReader(b.buf.Bytes()))
	sc.Buffer(nil, 1<<20)
	for sc.Scan() {
		var line map[string]any
		if err := json.Unmarshal(sc.Bytes(), &line); err != nil {
			t.Fatalf("log line %q: %v", sc.Text(), err)
		}
		out = append(out, line)
	}
	return out
}

// startLoggedServer serves the API with authentication off (so that no
// database is needed for what these tests reach), logging JSON at level
// into the returned buffer; routes adds test-only routes.
func startLoggedServer(t *testing.T, level slog.Level, routes func(e *echo.Echo)) (*httptest.Server, *logBuffer) {
	t.Helper()
	logs := &logBuffer{}
	logger := slog.New(slog.NewJSONHandler(logs, &slog.HandlerOptions{Level: level}))
	e := NewServer(Config{}, Deps{Logger: logger, Metrics: metrics.New(prometheus.NewRegistry())}).(*echo.Echo)
	if routes != nil {
		routes(e)
	}
	srv := httptest.NewServer(e)
	t.Cleanup(srv.Close)
	return srv, logs
}

func get(t *testing.T, url string, header http.Header) (*http.Response, []byte) {
	t.Helper()
	req, err := http.NewRequest(http.MethodGet, url, nil)
	if err != nil {
		t.Fatal(err)
	}
	for k, v := range header {
		req.Header[k] = v
	}
	res, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer res.Body.Close()
	body, err := io.ReadAll(res.Body)
	if err != nil {
		t.Fatal(err)
	}
	return res, body
}

// A handler's panic is answered with 500 problem JSON that names the
// request, logged once with its stack and its route, and the server goes
// on serving.
func TestPanicIsAnsweredLoggedOnceAndSurvived(t *testing.T) {
	srv, logs := startLoggedServer(t, slog.LevelInfo, func(e *echo.Echo) {
		e.GET("/test/panics/:thing", func(echo.Context) error { panic("a test handler gave up") })
	})
	res, body := get(t, srv.URL+"/test/panics/widget", http.Header{headerRequestID: {"panic-check-1"}})
	if res.StatusCode != http.StatusInternalServerError || res.Header.Get(echo.HeaderContentType) != problemContentType {
		t.Fatalf("status %d, type %q, body %s", res.StatusCode, res.Header.Get(echo.HeaderContentType), body)
	}
	var p Problem
	if err := json.Unmarshal(body, &p); err != nil {
		t.Fatal(err)
	}
	if p.Status != http.StatusInternalServerError || p.RequestID != "panic-check-1" || strings.Contains(p.Detail, "gave up") {
		t.Errorf("problem %+v: want status 500, request_id panic-check-1 and no panic text", p)
	}
	if got := res.Header.Get(headerRequestID); got != "panic-check-1" {
		t.Errorf("X-Request-Id %q, want panic-check-1", got)
	}

	if res, _ := get(t, srv.URL+"/livez", nil); res.StatusCode != http.StatusOK {
		t.Fatalf("after the panic /livez answered %d", res.StatusCode)
	}
	var logged []map[string]any
	for _, l := range logs.lines(t) {
		if text, _ := json.Marshal(l); strings.Contains(string(text), "gave up") || l["request_id"] == "panic-check-1" {
			logged = append(logged, l)
		}
	}
	if len(logged) != 1 {
		t.Fatalf("the panic was logged %d times, want once: %v", len(logged), logged)
	}
	l := logged[0]
	if errText, _ := l["error"].(string); l["level"] != "ERROR" || l["msg"] != "request" || l["route"] != "/test/panics/:thing" ||
		l["status"] != float64(500) || !strings.Contains(errText, "a test handler gave up") {
		t.Errorf("log line %v", l)
	}
	if stack, _ := l["stack"].(string); !strings.Contains(stack, "TestPanicIsAnsweredLoggedOnceAndSurvived") {
		t.Errorf("the stack does not show the panicking handler: %q", stack)
	}
	if strings.Contains(logs.String(), "widget") {
		t.Errorf("the log names the raw path, not the route: %s", logs.String())
	}
}

var madeRequestID = regexp.MustCompile(`^[0-9a-f]{32}$`)

// A sane id sent with the request is kept; anything else is replaced by
// a new one, different for every request.
func TestRequestIDIsKeptWhenSaneElseMade(t *testing.T) {
	srv, _ := startLoggedServer(t, slog.LevelInfo, nil)
	for _, id := range []string{"a", "3f2b9c4e-0d1a-4c7e-9a55-8d2f61b0c9e1", "trace:7/abc+d==", strings.Repeat("x", maxRequestIDLength)} {
		res, _ := get(t, srv.URL+"/livez", http.Header{headerRequestID: {id}})
		if got := res.Header.Get(headerRequestID); got != id {
			t.Errorf("sent %q, answered %q", id, got)
		}
	}
	seen := map[string]bool{}
	for _, h := range []http.Header{nil, {headerRequestID: {""}}, {headerRequestID: {"two words"}}, {headerRequestID: {`"quoted"`}},
		{headerRequestID: {"naïve"}}, {headerRequestID: {"a;b"}}, {headerRequestID: {strings.Repeat("x", maxRequestIDLength+1)}},
		{headerRequestID: {"first", "second"}}} {
		res, _ := get(t, srv.URL+"/livez", h)
		got := res.Header.Get(headerRequestID)
		if !madeRequestID.MatchString(got) || seen[got] {
			t.Errorf("sent %q, answered %q: want a new id of 32 hex digits", h[headerRequestID], got)
		}
		seen[got] = true
	}
}

// Each request gets one line with the route's pattern (never the raw
// path), its method, status, size and duration; at the default level a
// request that neither failed nor took long writes none.
func TestRequestLogLine(t *testing.T) {
	url := "/v1/policies/checkout-7/states?limit=0"
	srv, logs := startLoggedServer(t, slog.LevelDebug, nil)
	res, body := get(t, srv.URL+url, http.Header{headerRequestID: {"line-check"}})
	if res.StatusCode != http.StatusBadRequest {
		t.Fatalf("status %d: %s", res.StatusCode, body)
	}
	var p Problem
	if err := json.Unmarshal(body, &p); err != nil || p.RequestID != "line-check" {
		t.Errorf("problem %s (%v): want request_id line-check", body, err)
	}
	lines := logs.lines(t)
	if len(lines) != 1 {
		t.Fatalf("%d log lines, want 1: %v", len(lines), lines)
	}
	l := lines[0]
	want := map[string]any{"level": "DEBUG", "msg": "request", "request_id": "line-check", "method": "GET",
		"route": "/v1/policies/:policy/states", "status": float64(400), "bytes": float64(len(body))}
	for k, v := range want {
		if l[k] != v {
			t.Errorf("%s is %v, want %v (line %v)", k, l[k], v, l)
		}
	}
	if d, ok := l["duration"].(float64); !ok || d <= 0 {
		t.Errorf("duration %v, want a positive number of nanoseconds", l["duration"])
	}
	if strings.Contains(logs.String(), "checkout-7") {
		t.Errorf("the log names the raw path: %s", logs.String())
	}

	quiet, quietLogs := startLoggedServer(t, slog.LevelInfo, nil)
	get(t, quiet.URL+url, nil)
	get(t, quiet.URL+"/livez", nil)
	if n := len(quietLogs.lines(t)); n != 0 {
		t.Errorf("at info level, quick requests that did not fail wrote %d lines", n)
	}
}

// The level of a request's line: failures always show, slow requests at
// the default level, the rest only at debug.
func TestRequestLineLevel(t *testing.T) {
	for _, tc := range []struct {
		line requestLine
		want slog.Level
	}{
		{requestLine{status: 200, elapsed: time.Millisecond}, slog.LevelDebug},
		{requestLine{status: 404, elapsed: time.Millisecond}, slog.LevelDebug},
		{requestLine{status: 200, elapsed: slowRequest}, slog.LevelWarn},
		{requestLine{status: 503, elapsed: time.Millisecond}, slog.LevelError},
		// An answer committed before the handler failed still shows.
		{requestLine{status: 200, elapsed: time.Millisecond, failure: io.ErrUnexpectedEOF}, slog.LevelError},
	} {
		if got := tc.line.level(); got != tc.want {
			t.Errorf("%+v: level %v, want %v", tc.line, got, tc.want)
		}
	}
}
