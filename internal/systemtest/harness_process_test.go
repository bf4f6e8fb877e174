package systemtest

import (
	"bufio"
	"bytes"
	"context"
	"net"
	"net/http"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"
)

// buildBinary builds qtally for tests that need real processes (to kill,
// signal or run several of). The Go build cache makes repeats cheap.
func buildBinary(t testing.TB) string {
	t.Helper()
	bin := filepath.Join(t.TempDir(), "qtally")
	out, err := exec.Command("go", "build", "-o", bin, "./cmd/qtally").CombinedOutput()
	if err != nil {
		t.Fatalf("go build: %v\n%s", err, out)
	}
	return bin
}

// process is a qtally running as its own OS process.
type process struct {
	t   testing.TB
	cmd *exec.Cmd
	URL string
	// authorization is a token with every scope for the process's database
	// (empty when the process runs without auth).
	authorization string
	stderr        *lockedBuffer
	exited        chan struct{}
	err           error
}

// startProcess runs `bin args...` with env added to this process's
// environment and waits until it listens (pass QTALLY_LISTEN=127.0.0.1:0).
// With a DATABASE_URL it creates a token for the process's API. The
// process is killed when the test ends.
func startProcess(t testing.TB, bin string, env map[string]string, args ...string) *process {
	t.Helper()
	cmd := exec.Command(bin, args...)
	cmd.Env = append(os.Environ(), "QTALLY_TOKEN_PEPPER="+testPepper)
	for k, v := range env {
		cmd.Env = append(cmd.Env, k+"="+v)
	}
	p := &process{t: t, cmd: cmd, stderr: &lockedBuffer{}, exited: make(chan struct{})}
	if env["DATABASE_URL"] != "" && env["QTALLY_NO_AUTH"] == "" {
		p.authorization = "Bearer " + createToken(t, env["DATABASE_URL"], "--label", "test process", "--scope", "ingest,choose,admin")
	}
	cmd.Stderr = p.stderr
	stdout, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		t.Fatalf("start %s: %v", bin, err)
	}
	addr := make(chan string, 1)
	go func() {
		sc := bufio.NewScanner(stdout)
		for sc.Scan() {
			if u, ok := strings.CutPrefix(sc.Text(), "qtally: listening on "); ok {
				addr <- u
			}
		}
	}()
	go func() {
		p.err = cmd.Wait()
		close(p.exited)
	}()
	t.Cleanup(func() {
		_ = cmd.Process.Kill()
		<-p.exited
	})
	select {
	case p.URL = <-addr:
	case <-p.exited:
		t.Fatalf("%v exited before listening: %v\n%s", args, p.err, p.stderr)
	case <-time.After(60 * time.Second):
		t.Fatalf("%v did not start listening\n%s", args, p.stderr)
	}
	return p
}

// client returns an HTTP client that sends the process's token.
func (p *process) client(timeout time.Duration) *http.Client {
	return tokenClient(p.authorization, timeout)
}

// tokenClient sends authorization (an Authorization header value) with
// every request that has none.
func tokenClient(authorization string, timeout time.Duration) *http.Client {
	return &http.Client{Timeout: timeout, Transport: authorizing{authorization: authorization}}
}

// authorizing adds an Authorization header to requests through base
// (http.DefaultTransport when nil).
type authorizing struct {
	authorization string
	base          http.RoundTripper
}

func (a authorizing) RoundTrip(req *http.Request) (*http.Response, error) {
	if a.authorization != "" && req.Header.Get("Authorization") == "" {
		req = req.Clone(req.Context())
		req.Header.Set("Authorization", a.authorization)
	}
	if a.base == nil {
		return http.DefaultTransport.RoundTrip(req)
	}
	return a.base.RoundTrip(req)
}

// kill ends the process at once, as a crash would.
func (p *process) kill() {
	_ = p.cmd.Process.Kill()
	<-p.exited
}

// terminate asks the process to stop and returns how long it took.
func (p *process) terminate(within time.Duration) time.Duration {
	p.t.Helper()
	start := time.Now()
	_ = p.cmd.Process.Signal(syscall.SIGTERM)
	select {
	case <-p.exited:
		return time.Since(start)
	case <-time.After(within):
		p.t.Fatalf("process did not exit within %v of SIGTERM\n%s", within, p.stderr)
		return 0
	}
}

func freeLoopbackPort(t *testing.T) string {
	t.Helper()
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	return l.Addr().String()
}

// freeLoopbackAddr is a TCP address on 127.0.0.1 that was free a moment ago.
func freeLoopbackAddr(t *testing.T) string {
	t.Helper()
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	return l.Addr().String()
}

// runBinary runs bin to completion and returns its standard output, or
// its standard error with the failure.
func runBinary(bin string, args ...string) ([]byte, error) {
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	var out, errOut bytes.Buffer
	cmd := exec.CommandContext(ctx, bin, args...)
	cmd.Stdout, cmd.Stderr = &out, &errOut
	if err := cmd.Run(); err != nil {
		return errOut.Bytes(), err
	}
	return out.Bytes(), nil
}

// processEnv is the environment of a qtally process on databaseURL.
func processEnv(databaseURL string) map[string]string {
	return map[string]string{"DATABASE_URL": databaseURL, "QTALLY_LISTEN": "127.0.0.1:0",
		"QTALLY_POLL_INTERVAL": "300ms", "QTALLY_LOG_FORMAT": "text"}
}

// withAppName tags a process's database sessions, so the test can find
// them in pg_stat_activity and pg_locks.
func withAppName(t testing.TB, databaseURL, name string) string {
	t.Helper()
	u, err := url.Parse(databaseURL)
	if err != nil {
		t.Fatalf("parse database URL: %v", err)
	}
	q := u.Query()
	q.Set("application_name", name)
	u.RawQuery = q.Encode()
	return u.String()
}

// api is the OpenAPI-checked client of startService, pointed at a process.
func (p *process) api() *service {
	return &service{t: p.t, URL: p.URL, stderr: p.stderr, router: openAPIRouter(p.t),
		client: &http.Client{Timeout: 30 * time.Second}, authorization: p.authorization}
}

// signal sends sig to the process.
func (p *process) signal(sig syscall.Signal) {
	p.t.Helper()
	if err := p.cmd.Process.Signal(sig); err != nil {
		p.t.Fatalf("signal %v: %v", sig, err)
	}
}
