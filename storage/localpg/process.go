package localpg

import (
	"bytes"
	"fmt"
	"os/exec"
	"runtime"
	"sync"
	"syscall"
	"time"
)

// process is a running child whose exit is observable through done.
type process struct {
	cmd  *exec.Cmd
	done chan struct{} // closed once the child has exited
	err  error         // cmd.Wait's result, set before done closes
}

// spawn starts cmd. The kernel sends Pdeathsig when the thread that forked
// the child exits, not the process, so the forking goroutine stays locked to
// its thread for the child's whole life.
func spawn(cmd *exec.Cmd) (*process, error) {
	p := &process{cmd: cmd, done: make(chan struct{})}
	started := make(chan error, 1)
	go func() {
		runtime.LockOSThread()
		if err := cmd.Start(); err != nil {
			started <- err
			return
		}
		started <- nil
		p.err = cmd.Wait()
		close(p.done)
	}()
	if err := <-started; err != nil {
		return nil, err
	}
	return p, nil
}

// wait blocks until the child exits and returns cmd.Wait's result.
func (p *process) wait() error {
	<-p.done
	return p.err
}

// exited reports whether the child has exited, without blocking.
func (p *process) exited() bool {
	select {
	case <-p.done:
		return true
	default:
		return false
	}
}

// shutdown asks postgres for a fast shutdown (roll back open transactions,
// disconnect clients, checkpoint) and waits for it; a server stuck past
// timeout is killed so that callers never hang.
func (p *process) shutdown(timeout time.Duration) error {
	if err := p.cmd.Process.Signal(syscall.SIGINT); err != nil && !p.exited() {
		return fmt.Errorf("signal postgres: %w", err)
	}
	select {
	case <-p.done:
		return p.err
	case <-time.After(timeout):
		_ = p.cmd.Process.Kill()
		<-p.done
		return fmt.Errorf("postgres did not shut down within %s and was killed", timeout)
	}
}

// tail keeps the end of a log so failures can show what the server said.
type tail struct {
	mu  sync.Mutex
	buf []byte
}

const tailSize = 8 << 10

func (t *tail) Write(b []byte) (int, error) {
	t.mu.Lock()
	defer t.mu.Unlock()
	t.buf = append(t.buf, b...)
	if over := len(t.buf) - tailSize; over > 0 {
		t.buf = append(t.buf[:0], t.buf[over:]...)
	}
	return len(b), nil
}

// String returns the kept log from its first whole line.
func (t *tail) String() string {
	t.mu.Lock()
	defer t.mu.Unlock()
	b := t.buf
	if len(b) == tailSize {
		if i := bytes.IndexByte(b, '\n'); i >= 0 {
			b = b[i+1:]
		}
	}
	return string(bytes.TrimSpace(b))
}
