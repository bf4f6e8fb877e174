package load

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net"
	"net/url"
	"strconv"
	"time"
)

// httpConn is one simulated client's kept-alive HTTP/1.1 connection to the
// service, on which it sends its requests one at a time, formatted by hand
// into a reused buffer as wrk does. Go's http.Client does per request about
// as much work as the server's answer to a choose (its transport's
// goroutines and channels, header maps, request and response objects), and
// the load generator has one core for hundreds of clients: with it, the
// sustained loop measured the clients as much as the service. This is still
// real HTTP/1.1 to the real server: every answer's status line and
// Content-Length are parsed and its body read in full and checked by the
// caller.
type httpConn struct {
	httpTarget
	conn   net.Conn
	r      *bufio.Reader
	req    []byte
	answer []byte
}

// requestTimeout bounds one request, as the Go client's timeout does.
const requestTimeout = 30 * time.Second

// httpTarget is where an httpConn connects and what it sends every time.
type httpTarget struct {
	addr    string // host:port to dial
	host    string // the Host header
	token   string
	policy  string
	actions []string
}

func newHTTPTarget(cfg Config) (httpTarget, error) {
	u, err := url.Parse(cfg.BaseURL)
	if err != nil || u.Scheme != "http" || u.Host == "" {
		return httpTarget{}, fmt.Errorf("load: %q is not an http:// URL", cfg.BaseURL)
	}
	addr := u.Host
	if u.Port() == "" {
		addr = net.JoinHostPort(u.Hostname(), "80")
	}
	return httpTarget{addr: addr, host: u.Host, token: cfg.Token, policy: cfg.Policy, actions: cfg.Actions}, nil
}

// errBeforeAnswer: the connection failed before any byte of the answer
// came, so the server did not take the request (an idle connection it had
// closed): sending it again on a new connection is safe.
var errBeforeAnswer = errors.New("connection closed before the answer")

// post sends body to path and returns the answer's status and body; the
// body is valid until the next call.
func (h *httpConn) post(ctx context.Context, path string, body []byte) (int, []byte, error) {
	reused := h.conn != nil
	status, answer, err := h.roundTrip(ctx, path, body)
	if err != nil && reused && errors.Is(err, errBeforeAnswer) && !runOver(ctx, err) {
		status, answer, err = h.roundTrip(ctx, path, body)
	}
	return status, answer, err
}

func (h *httpConn) close() {
	if h.conn != nil {
		_ = h.conn.Close()
		h.conn, h.r = nil, nil
	}
}

func (h *httpConn) roundTrip(ctx context.Context, path string, body []byte) (status int, answer []byte, err error) {
	if err = ctx.Err(); err != nil {
		return 0, nil, err
	}
	deadline := time.Now().Add(requestTimeout)
	runEnd, ends := ctx.Deadline()
	if ends && runEnd.Before(deadline) {
		deadline = runEnd
		// The connection's deadline can pass before ctx says it is done:
		// a timeout then is the run's end, not a failed request.
		defer func() {
			if err != nil && !time.Now().Before(runEnd) {
				err = fmt.Errorf("%w: %w", context.DeadlineExceeded, err)
			}
		}()
	}
	if h.conn == nil {
		d := net.Dialer{Deadline: deadline}
		conn, dialErr := d.DialContext(ctx, "tcp", h.addr)
		if dialErr != nil {
			return 0, nil, dialErr
		}
		h.conn, h.r = conn, bufio.NewReaderSize(conn, 4096)
	}
	if err = h.conn.SetDeadline(deadline); err != nil {
		h.close()
		return 0, nil, err
	}
	h.req = append(h.req[:0], "POST "...)
	h.req = append(h.req, path...)
	h.req = append(h.req, " HTTP/1.1\r\nHost: "...)
	h.req = append(h.req, h.host...)
	if h.token != "" {
		h.req = append(h.req, "\r\nAuthorization: Bearer "...)
		h.req = append(h.req, h.token...)
	}
	h.req = append(h.req, "\r\nContent-Type: application/json\r\nContent-Length: "...)
	h.req = strconv.AppendInt(h.req, int64(len(body)), 10)
	h.req = append(h.req, "\r\n\r\n"...)
	h.req = append(h.req, body...)
	if _, err = h.conn.Write(h.req); err != nil {
		h.close()
		return 0, nil, fmt.Errorf("%w: %w", errBeforeAnswer, err)
	}
	status, keep, err := h.readAnswer()
	if err != nil || !keep {
		h.close()
	}
	return status, h.answer, err
}

// readAnswer reads one answer: status line, headers (Content-Length is
// required; chunked bodies are not expected from these routes) and body.
func (h *httpConn) readAnswer() (status int, keep bool, err error) {
	line, err := h.r.ReadSlice('\n')
	if err != nil {
		if len(line) == 0 {
			return 0, false, fmt.Errorf("%w: %w", errBeforeAnswer, err)
		}
		return 0, false, fmt.Errorf("read the status line: %w", err)
	}
	// "HTTP/1.1 200 OK\r\n"
	if len(line) < 12 || !bytes.HasPrefix(line, []byte("HTTP/1.")) || line[8] != ' ' {
		return 0, false, fmt.Errorf("not an HTTP/1.x status line: %q", line)
	}
	status, err = strconv.Atoi(string(line[9:12]))
	if err != nil {
		return 0, false, fmt.Errorf("status line %q: %w", line, err)
	}
	length, keep := -1, true
	for {
		line, err := h.r.ReadSlice('\n')
		if err != nil {
			return 0, false, fmt.Errorf("read the headers: %w", err)
		}
		line = bytes.TrimRight(line, "\r\n")
		if len(line) == 0 {
			break
		}
		name, value, ok := bytes.Cut(line, []byte(":"))
		if !ok {
			return 0, false, fmt.Errorf("header line %q has no colon", line)
		}
		value = bytes.TrimSpace(value)
		switch {
		case bytes.EqualFold(name, []byte("Content-Length")):
			if length, err = strconv.Atoi(string(value)); err != nil || length < 0 {
				return 0, false, fmt.Errorf("Content-Length %q", value)
			}
		case bytes.EqualFold(name, []byte("Transfer-Encoding")):
			return 0, false, fmt.Errorf("a %s body; this client reads only bodies with a Content-Length", value)
		case bytes.EqualFold(name, []byte("Connection")) && bytes.EqualFold(value, []byte("close")):
			keep = false
		}
	}
	if length < 0 {
		return 0, false, errors.New("an answer without Content-Length")
	}
	if cap(h.answer) < length {
		h.answer = make([]byte, length)
	}
	h.answer = h.answer[:length]
	if _, err := io.ReadFull(h.r, h.answer); err != nil {
		return 0, false, fmt.Errorf("read the body: %w", err)
	}
	return status, keep, nil
}

// runOver tells whether err is the end of the run (its context done or its
// deadline passed) rather than a failed request.
func runOver(ctx context.Context, err error) bool {
	return ctx.Err() != nil || errors.Is(err, context.DeadlineExceeded)
}

// appendJSONString appends s as a JSON string.
func appendJSONString(dst []byte, s string) []byte {
	for i := 0; i < len(s); i++ {
		if c := s[i]; c < 0x20 || c >= 0x80 || c == '"' || c == '\\' {
			quoted, _ := json.Marshal(s) // strings always marshal
			return append(dst, quoted...)
		}
	}
	dst = append(dst, '"')
	dst = append(dst, s...)
	return append(dst, '"')
}

// chooser sends choose requests (plain or recorded in an open episode) on
// an httpConn and checks each answer.
type chooser struct {
	conn *httpConn
	path string
	body []byte
}

func newChooser(t httpTarget) *chooser {
	return &chooser{conn: &httpConn{httpTarget: t}, path: policyPath(t.policy, "choose")}
}

// policyPath is the path of a policy's resource, each name escaped.
func policyPath(policy string, rest ...string) string {
	p := "/v1/policies/" + url.PathEscape(policy)
	for _, r := range rest {
		p += "/" + url.PathEscape(r)
	}
	return p
}

// choose asks for an explore-mode action in state; with episode set, the
// decision is recorded as that episode's step. It returns the action (one
// of the policy's) and its probability.
func (c *chooser) choose(ctx context.Context, state, episode string, step int) (string, float64, error) {
	c.body = append(c.body[:0], `{"state":`...)
	c.body = appendJSONString(c.body, state)
	c.body = append(c.body, `,"mode":"explore"`...)
	if episode != "" {
		c.body = append(c.body, `,"episode":`...)
		c.body = appendJSONString(c.body, episode)
		c.body = append(c.body, `,"step":`...)
		c.body = strconv.AppendInt(c.body, int64(step), 10)
	}
	c.body = append(c.body, '}')
	status, answer, err := c.conn.post(ctx, c.path, c.body)
	if err != nil {
		return "", 0, fmt.Errorf("choose: %w", err)
	}
	if status != 200 {
		return "", 0, fmt.Errorf("choose: %d %s", status, excerpt(answer))
	}
	return c.parseChoice(answer)
}

// parseChoice reads the action and probability of a choose answer and
// checks them: an action of the policy, a probability in (0, 1].
func (c *chooser) parseChoice(answer []byte) (string, float64, error) {
	raw, ok := jsonField(answer, `"action":`)
	if !ok || len(raw) < 2 || raw[0] != '"' || raw[len(raw)-1] != '"' {
		return "", 0, fmt.Errorf("choose: no action in %s", excerpt(answer))
	}
	action := ""
	for _, a := range c.conn.actions {
		if string(raw[1:len(raw)-1]) == a {
			action = a
			break
		}
	}
	if action == "" {
		return "", 0, fmt.Errorf("choose: action %s is none of the policy's", raw)
	}
	raw, ok = jsonField(answer, `"probability":`)
	if !ok {
		return "", 0, fmt.Errorf("choose: no probability in %s", excerpt(answer))
	}
	p, err := strconv.ParseFloat(string(raw), 64)
	if err != nil || !(p > 0 && p <= 1) {
		return "", 0, fmt.Errorf("choose: probability %s is not in (0, 1]", raw)
	}
	return action, p, nil
}

// jsonField is the raw value after key in a flat JSON object whose string
// values hold no escaped quotes (the choose answer's action and numbers).
func jsonField(obj []byte, key string) ([]byte, bool) {
	i := bytes.Index(obj, []byte(key))
	if i < 0 {
		return nil, false
	}
	v := obj[i+len(key):]
	if len(v) > 0 && v[0] == '"' {
		end := bytes.IndexByte(v[1:], '"')
		if end < 0 {
			return nil, false
		}
		return v[:end+2], true
	}
	end := bytes.IndexAny(v, ",}")
	if end < 0 {
		return nil, false
	}
	return bytes.TrimSpace(v[:end]), true
}

func excerpt(b []byte) string {
	if len(b) > 200 {
		return string(b[:200]) + "..."
	}
	return string(b)
}
