package systemtest

import (
	"bufio"
	"net/http"
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
