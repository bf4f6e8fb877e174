package systemtest

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"maps"
	"net/http"
	"regexp"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/getkin/kin-openapi/openapi3"
	"github.com/getkin/kin-openapi/openapi3filter"
	"github.com/getkin/kin-openapi/routers"
	"github.com/getkin/kin-openapi/routers/gorillamux"
	"github.com/qtally/qtally/api"
)

// withHeader is the same service seen by a client that adds this header to
// every request.
func (s *service) withHeader(name, value string) *service {
	c := *s
	c.headers = map[string]string{}
	for k, v := range s.headers {
		c.headers[k] = v
	}
	c.headers[name] = value
	return &c
}

// service is a qtally started through run, as the binary would be.
type service struct {
	t      testing.TB
	URL    string
	stdout *lockedBuffer
	stderr *lockedBuffer
	router routers.Router
	client *http.Client
	stop   func()
	// authorization is the Authorization header sent ("" for none): a
	// token with every scope that the harness creates, as an operator would.
	authorization string
	databaseURL   string
	// headers are sent with every request (If-Match and the like).
	headers map[string]string
}

type lockedBuffer struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (b *lockedBuffer) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.Write(p)
}

func (b *lockedBuffer) String() string {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.String()
}

// startService runs `qtally <args>` against databaseURL on a free
// loopback port and stops it when the test ends.
func startService(t testing.TB, databaseURL string, args ...string) *service {
	t.Helper()
	return startServiceWith(t, databaseURL, nil, args...)
}

// startServiceWith is startService with more environment variables.
func startServiceWith(t testing.TB, databaseURL string, extraEnv map[string]string, args ...string) *service {
	t.Helper()
	env := map[string]string{"DATABASE_URL": databaseURL, "QTALLY_LISTEN": "127.0.0.1:0", "QTALLY_POLL_INTERVAL": "300ms",
		"QTALLY_TOKEN_PEPPER": testPepper}
	maps.Copy(env, extraEnv)
	if len(args) == 0 {
		args = []string{"serve"}
	}
	token := createToken(t, databaseURL, "--label", "test harness", "--scope", "ingest,choose,admin")
	ctx, cancel := context.WithCancel(context.Background())
	outR, outW := io.Pipe()
	stdout, stderr := &lockedBuffer{}, &lockedBuffer{}
	done := make(chan error, 1)
	go func() {
		done <- run(ctx, append([]string{"qtally"}, args...), func(k string) string { return env[k] }, outW, stderr)
		outW.Close()
	}()
	addr := make(chan string, 1)
	go func() {
		sc := bufio.NewScanner(outR)
		for sc.Scan() {
			fmt.Fprintln(stdout, sc.Text())
			if u, ok := strings.CutPrefix(sc.Text(), "qtally: listening on "); ok {
				addr <- u
			}
		}
	}()
	s := &service{t: t, stdout: stdout, stderr: stderr, router: openAPIRouter(t), client: &http.Client{Timeout: 30 * time.Second},
		authorization: "Bearer " + token, databaseURL: databaseURL}
	select {
	case s.URL = <-addr:
	case err := <-done:
		cancel()
		t.Fatalf("qtally exited before listening: %v\n%s", err, stderr)
	case <-time.After(60 * time.Second):
		cancel()
		t.Fatalf("qtally did not start listening\n%s", stderr)
	}
	var once sync.Once
	s.stop = func() {
		once.Do(func() {
			cancel()
			select {
			case err := <-done:
				if err != nil {
					t.Errorf("qtally exited with %v", err)
				}
			case <-time.After(30 * time.Second):
				t.Errorf("qtally did not stop within 30 s")
			}
		})
	}
	t.Cleanup(s.stop)
	return s
}

func openAPIRouter(t testing.TB) routers.Router {
	t.Helper()
	loader := openapi3.NewLoader()
	doc, err := loader.LoadFromData(api.OpenAPIDocument)
	if err != nil {
		t.Fatalf("load OpenAPI document: %v", err)
	}
	if err = doc.Validate(loader.Context); err != nil {
		t.Fatalf("OpenAPI document is invalid: %v", err)
	}
	router, err := gorillamux.NewRouter(doc)
	if err != nil {
		t.Fatalf("OpenAPI router: %v", err)
	}
	return router
}

// reply is an HTTP answer read whole.
type reply struct {
	Status int
	Header http.Header
	Body   []byte
}

func (r reply) decode(t testing.TB, v any) {
	t.Helper()
	if err := json.Unmarshal(r.Body, v); err != nil {
		t.Fatalf("decode %s: %v", r.Body, err)
	}
}

// send makes a request and checks it, unless raw, and always its answer,
// against the OpenAPI document, so the document cannot drift from the code.
func (s *service) send(method, path, contentType string, body []byte, raw bool) reply {
	s.t.Helper()
	req, err := http.NewRequest(method, s.URL+path, bytes.NewReader(body))
	if err != nil {
		s.t.Fatal(err)
	}
	if contentType != "" {
		req.Header.Set("Content-Type", contentType)
	}
	if s.authorization != "" {
		req.Header.Set("Authorization", s.authorization)
	}
	for k, v := range s.headers {
		req.Header.Set(k, v)
	}
	route, params, err := s.router.FindRoute(req)
	if err != nil {
		s.t.Fatalf("%s %s is not in the OpenAPI document: %v", method, path, err)
	}
	in := &openapi3filter.RequestValidationInput{Request: req, PathParams: params, Route: route,
		Options: &openapi3filter.Options{MultiError: true, AuthenticationFunc: checkBearer}}
	if !raw {
		if err = openapi3filter.ValidateRequest(context.Background(), in); err != nil {
			s.t.Fatalf("request %s %s does not match the OpenAPI document: %v", method, path, err)
		}
		// The validator may have put a body with the document's defaults
		// filled in: send what the test wrote.
		req.Body, req.ContentLength = io.NopCloser(bytes.NewReader(body)), int64(len(body))
	}
	resp, err := s.client.Do(req)
	if err != nil {
		s.t.Fatalf("%s %s: %v", method, path, err)
	}
	defer resp.Body.Close()
	data, err := io.ReadAll(resp.Body)
	if err != nil {
		s.t.Fatal(err)
	}
	out := &openapi3filter.ResponseValidationInput{RequestValidationInput: in, Status: resp.StatusCode, Header: resp.Header,
		Options: &openapi3filter.Options{IncludeResponseStatus: true, MultiError: true}}
	out.SetBodyBytes(data)
	if err := openapi3filter.ValidateResponse(context.Background(), out); err != nil {
		s.t.Fatalf("answer to %s %s (%d %s) does not match the OpenAPI document: %v", method, path, resp.StatusCode, data, err)
	}
	return reply{Status: resp.StatusCode, Header: resp.Header, Body: data}
}

// checkBearer holds when a request carries what the document's security
// scheme asks for; whether the token is good is the service's to say.
func checkBearer(_ context.Context, in *openapi3filter.AuthenticationInput) error {
	if in.SecurityScheme.Type != "http" || in.SecurityScheme.Scheme != "bearer" {
		return fmt.Errorf("unexpected security scheme %q", in.SecuritySchemeName)
	}
	if !strings.HasPrefix(in.RequestValidationInput.Request.Header.Get("Authorization"), "Bearer ") {
		return fmt.Errorf("no bearer token")
	}
	return nil
}

// createToken runs `qtally token create flags...` against databaseURL and
// returns the secret it prints.
func createToken(t testing.TB, databaseURL string, flags ...string) string {
	t.Helper()
	return createTokenWith(t, map[string]string{"DATABASE_URL": databaseURL, "QTALLY_TOKEN_PEPPER": testPepper}, flags...)
}

// createTokenWith runs `qtally token create flags...` with env.
func createTokenWith(t testing.TB, env map[string]string, flags ...string) string {
	t.Helper()
	var out bytes.Buffer
	args := append([]string{"qtally", "token", "create"}, flags...)
	if err := run(context.Background(), args, func(k string) string { return env[k] }, &out, io.Discard); err != nil {
		t.Fatalf("%v: %v", args, err)
	}
	for _, line := range strings.Split(out.String(), "\n") {
		if secret, ok := strings.CutPrefix(line, "secret: "); ok {
			return secret
		}
	}
	t.Fatalf("%v printed no secret:\n%s", args, out.String())
	return ""
}

// call sends a JSON body (nil for none) and checks the status.
func (s *service) call(method, path string, body any, wantStatus int) reply {
	s.t.Helper()
	var data []byte
	ctype := ""
	if body != nil {
		var err error
		if data, err = json.Marshal(body); err != nil {
			s.t.Fatal(err)
		}
		ctype = "application/json"
	}
	r := s.send(method, path, ctype, data, false)
	if r.Status != wantStatus {
		s.t.Fatalf("%s %s: status %d, want %d: %s", method, path, r.Status, wantStatus, r.Body)
	}
	return r
}

// waitFor polls cond until it holds or the deadline passes.
// patience is how long a test waits for what must happen: only a hang
// takes this long, even on a machine busy with a benchmark beside the tests
// and the other tests running in parallel.
const patience = 2 * time.Minute

func waitFor(t testing.TB, within time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(within)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out after %v waiting for %s", within, what)
		}
		time.Sleep(10 * time.Millisecond)
	}
}

func must[T any](v T, err error) T {
	if err != nil {
		panic(fmt.Sprintf("unexpected error: %v", err))
	}
	return v
}

// grepLines keeps the lines of text that contain word, for failure messages.
func grepLines(text, word string) string {
	var out []string
	for _, l := range strings.Split(text, "\n") {
		if strings.Contains(l, word) {
			out = append(out, l)
		}
	}
	return strings.Join(out, "\n")
}

// as is the same service seen by a client sending secret ("" for none).
func (s *service) as(secret string) *service {
	if secret == "" {
		return s.withAuthorization("")
	}
	return s.withAuthorization("Bearer " + secret)
}

// withAuthorization is the same service seen by a client sending this
// Authorization header ("" for none).
func (s *service) withAuthorization(header string) *service {
	c := *s
	c.authorization = header
	return &c
}

// qtally runs a command of the binary against the service's database.
func (s *service) qtally(args ...string) (string, error) {
	var out bytes.Buffer
	env := map[string]string{"DATABASE_URL": s.databaseURL, "QTALLY_TOKEN_PEPPER": testPepper}
	err := run(context.Background(), append([]string{"qtally"}, args...), func(k string) string { return env[k] }, &out, io.Discard)
	return out.String(), err
}

var tokenIDPattern = regexp.MustCompile(`^qtk_(\d+)_`)

func tokenID(t testing.TB, secret string) string {
	t.Helper()
	m := tokenIDPattern.FindStringSubmatch(secret)
	if m == nil {
		t.Fatalf("%q is not a token secret", secret)
	}
	return m[1]
}

// withT reports the service's failures to t, a subtest.
func (s *service) withT(t testing.TB) *service {
	c := *s
	c.t = t
	return &c
}
