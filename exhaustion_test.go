package main

import (
	"bufio"
	"errors"
	"fmt"
	"io"
	"mime/multipart"
	"net"
	"net/http"
	"net/url"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/storage/pgtest"
)

// hangGuard only catches a connection the server never answers or closes;
// no check compares how long anything took.
const hangGuard = 20 * time.Second

// dialService opens a raw connection to a service, closed when the test ends.
func dialService(t *testing.T, s *service) net.Conn {
	t.Helper()
	u, err := url.Parse(s.URL)
	if err != nil {
		t.Fatal(err)
	}
	conn, err := net.Dial("tcp", u.Host)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	return conn
}

// closedByServer reads until the server closes the connection, answering
// first or not, and fails when it stays open past the hang guard.
func closedByServer(t *testing.T, conn net.Conn, what string) {
	t.Helper()
	if err := conn.SetReadDeadline(time.Now().Add(hangGuard)); err != nil {
		t.Fatal(err)
	}
	_, err := io.Copy(io.Discard, conn)
	var ne net.Error
	if errors.As(err, &ne) && ne.Timeout() {
		t.Fatalf("%s: the server kept the connection open", what)
	}
}

// Request metrics take labels from fixed sets only: a client without a
// token sending made-up methods to made-up paths adds no series.
func TestRequestMetricLabelsAreBounded(t *testing.T) {
	db := pgtest.NewDatabase(t)
	for _, role := range []string{"serve", "worker"} {
		t.Run(role, func(t *testing.T) {
			s := startService(t, db, role)
			hostile := func(round int) {
				for i := range 10 {
					conn := dialService(t, s)
					method := fmt.Sprintf("M%d%s%d", round, strings.Repeat("X", 2000), i)
					fmt.Fprintf(conn, "%s /v1/policies/p%d-%d/choose HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n", method, round, i)
					closedByServer(t, conn, "a request with a made-up method")
				}
			}
			series := func() (int, string) {
				text, families := s.scrape()
				f := families["qtally_http_request_duration_seconds"]
				if f == nil {
					return 0, text
				}
				fixedMethods := map[string]bool{"GET": true, "HEAD": true, "POST": true, "PUT": true, "PATCH": true,
					"DELETE": true, "OPTIONS": true, "other": true}
				for _, m := range f.GetMetric() {
					for _, l := range m.GetLabel() {
						if l.GetName() == "method" && !fixedMethods[l.GetValue()] {
							t.Fatalf("method label %.40q... is not from the fixed set", l.GetValue())
						}
						if l.GetName() == "route" && strings.Contains(l.GetValue(), "/p1-") {
							t.Fatalf("route label %q is a raw path", l.GetValue())
						}
					}
				}
				return len(f.GetMetric()), text
			}
			series() // the scrape itself is counted from the next one on
			hostile(1)
			first, _ := series()
			hostile(2)
			second, text := series()
			if first == 0 {
				t.Fatal("no request was counted")
			}
			if second != first {
				t.Errorf("ten more requests with new methods added %d series", second-first)
			}
			if strings.Contains(text, "XXXXXXXX") {
				t.Errorf("/metrics holds a made-up method name")
			}
		})
	}
}

// Signing in reads a small body only, and each client address gets a few
// attempts at a time: guessing and memory cost stay bounded without a token.
func TestSignInBodyAndAttemptsAreLimited(t *testing.T) {
	s := startService(t, pgtest.NewDatabase(t))
	client := &http.Client{CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
	post := func(contentType string, body io.Reader) *http.Response {
		t.Helper()
		resp, err := client.Post(s.URL+"/sign-in", contentType, body)
		if err != nil {
			t.Fatal(err)
		}
		_, _ = io.Copy(io.Discard, resp.Body)
		resp.Body.Close()
		return resp
	}

	large := url.Values{"token": {strings.Repeat("x", 100_000)}}.Encode()
	if resp := post("application/x-www-form-urlencoded", strings.NewReader(large)); resp.StatusCode != http.StatusRequestEntityTooLarge {
		t.Errorf("100 kB form: %d, want 413", resp.StatusCode)
	}
	var multi strings.Builder
	w := multipart.NewWriter(&multi)
	part, _ := w.CreateFormFile("upload", "big.bin")
	_, _ = part.Write(make([]byte, 1<<20))
	_ = w.WriteField("token", "qtk_1_"+strings.Repeat("a", 43))
	_ = w.Close()
	if resp := post(w.FormDataContentType(), strings.NewReader(multi.String())); resp.StatusCode != http.StatusRequestEntityTooLarge {
		t.Errorf("1 MB multipart form: %d, want 413", resp.StatusCode)
	}

	limited := false
	for i := range 50 {
		form := url.Values{"token": {fmt.Sprintf("qtk_%d_%s", i+1, strings.Repeat("b", 43))}}.Encode()
		resp := post("application/x-www-form-urlencoded", strings.NewReader(form))
		if resp.StatusCode == http.StatusTooManyRequests {
			if resp.Header.Get("Retry-After") == "" {
				t.Errorf("429 without Retry-After")
			}
			limited = true
			break
		}
		if resp.StatusCode != http.StatusUnauthorized {
			t.Fatalf("attempt %d: %d, want 401 or 429", i, resp.StatusCode)
		}
	}
	if !limited {
		t.Errorf("50 wrong sign-ins from one address were all checked; want 429 after a few")
	}
}

// Connections of slow or idle clients end: an idle keep-alive connection
// after the idle timeout, a body that never arrives after the read timeout,
// and an oversized header block at once.
func TestSlowAndIdleConnectionsAreClosed(t *testing.T) {
	s := startServiceWith(t, pgtest.NewDatabase(t), map[string]string{
		"QTALLY_IDLE_TIMEOUT": "300ms", "QTALLY_READ_TIMEOUT": "500ms", "QTALLY_BULK_TIMEOUT": "1s"})
	s.call("PUT", "/v1/policies/slow", map[string]any{"actions": []string{"a", "b"}}, 201)

	t.Run("idle after a 401", func(t *testing.T) {
		conn := dialService(t, s)
		fmt.Fprintf(conn, "GET /v1/policies HTTP/1.1\r\nHost: x\r\n\r\n")
		resp, err := http.ReadResponse(bufio.NewReader(conn), nil)
		if err != nil {
			t.Fatal(err)
		}
		resp.Body.Close()
		if resp.StatusCode != http.StatusUnauthorized {
			t.Fatalf("no token: %d", resp.StatusCode)
		}
		closedByServer(t, conn, "an idle connection after a 401")
	})
	t.Run("idle after a good request", func(t *testing.T) {
		conn := dialService(t, s)
		fmt.Fprintf(conn, "GET /v1/policies HTTP/1.1\r\nHost: x\r\nAuthorization: %s\r\n\r\n", s.authorization)
		br := bufio.NewReader(conn)
		resp, err := http.ReadResponse(br, nil)
		if err != nil {
			t.Fatal(err)
		}
		_, _ = io.Copy(io.Discard, resp.Body)
		resp.Body.Close()
		if resp.StatusCode != http.StatusOK {
			t.Fatalf("listing policies: %d", resp.StatusCode)
		}
		closedByServer(t, conn, "an idle keep-alive connection")
	})
	for _, c := range []struct{ name, path, authorization string }{
		{"choose", "/v1/policies/slow/choose", s.authorization},
		{"episodes (bulk)", "/v1/policies/slow/episodes", s.authorization},
		{"no token", "/v1/policies/slow/episodes", "Bearer qtk_1_" + strings.Repeat("z", 43)},
	} {
		t.Run("body never sent, "+c.name, func(t *testing.T) {
			conn := dialService(t, s)
			fmt.Fprintf(conn, "POST %s HTTP/1.1\r\nHost: x\r\nAuthorization: %s\r\n"+
				"Content-Type: application/json\r\nContent-Length: 100000\r\n\r\n{", c.path, c.authorization)
			closedByServer(t, conn, "a POST declaring 100000 bytes and sending 1")
		})
	}
	t.Run("huge header block", func(t *testing.T) {
		conn := dialService(t, s)
		fmt.Fprintf(conn, "GET /livez HTTP/1.1\r\nHost: x\r\nX-Filler: %s\r\n\r\n", strings.Repeat("f", 200_000))
		resp, err := http.ReadResponse(bufio.NewReader(conn), nil)
		if err != nil {
			t.Fatal(err)
		}
		resp.Body.Close()
		if resp.StatusCode != http.StatusRequestHeaderFieldsTooLarge {
			t.Fatalf("200 kB of headers: %d, want 431", resp.StatusCode)
		}
	})
}
