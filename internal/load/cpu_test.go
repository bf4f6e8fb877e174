package load

import (
	"fmt"
	"os"
	"path/filepath"
	"strconv"
	"testing"
	"time"
)

// A /proc/<pid>/stat line (proc(5)): pid, (comm), state, ppid, then
// utime and stime as fields 14 and 15, in clock ticks.
func statLine(pid, ppid int, comm string, utime, stime int) string {
	return fmt.Sprintf("%d (%s) S %d 1 1 0 -1 4194560 100 0 0 0 %d %d 0 0 20 0 1 0 100 1000 100\n", pid, comm, ppid, utime, stime)
}

func TestProcessTreeCPUSumsTheServerAndItsChildren(t *testing.T) {
	proc := t.TempDir()
	for _, p := range []struct {
		pid, ppid    int
		comm         string
		utime, stime int
	}{
		{100, 1, "postgres", 50, 25},
		// A command name with spaces and parentheses, as backends set theirs.
		{101, 100, "postgres: qtally qtally 127.0.0.1(5432) idle", 200, 100},
		{102, 100, "postgres", 7, 3},
		{103, 101, "grandchild", 1000, 1000}, // not a child of the server
		{200, 1, "other) (x", 900, 900},
	} {
		dir := filepath.Join(proc, strconv.Itoa(p.pid))
		if err := os.MkdirAll(dir, 0o700); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(filepath.Join(dir, "stat"), []byte(statLine(p.pid, p.ppid, p.comm, p.utime, p.stime)), 0o600); err != nil {
			t.Fatal(err)
		}
	}
	if err := os.MkdirAll(filepath.Join(proc, "self"), 0o700); err != nil {
		t.Fatal(err)
	}
	got, err := processTreeCPU(proc, 100)
	if err != nil {
		t.Fatal(err)
	}
	// 75 + 300 + 10 ticks at 100 a second.
	if want := 3850 * time.Millisecond; got != want {
		t.Errorf("got %v, want %v", got, want)
	}
	if _, err := processTreeCPU(proc, 999); err == nil {
		t.Error("a process that is not there was read")
	}
}

func TestParseStatRefusesShortLines(t *testing.T) {
	for _, line := range []string{"", "12 (x) S 1 2 3", "12 x S 1"} {
		if _, _, err := parseStat(line); err == nil {
			t.Errorf("%q was read", line)
		}
	}
	ppid, ticks, err := parseStat(statLine(7, 3, "a (b) c", 11, 4))
	if err != nil || ppid != 3 || ticks != 15 {
		t.Errorf("got parent %d, %d ticks, %v; want 3, 15", ppid, ticks, err)
	}
}

// The real /proc of this machine holds this process.
func TestProcessTreeCPUReadsThisMachine(t *testing.T) {
	if _, err := processTreeCPU("/proc", os.Getpid()); err != nil {
		t.Fatal(err)
	}
}

func TestPerRequestLeavesUnreadFiguresOut(t *testing.T) {
	f := Figures{Requests: 1000}
	f.perRequest(cpuTimes{client: time.Second, service: -1, postgres: 2 * time.Second},
		cpuTimes{client: 2 * time.Second, service: -1, postgres: 2500 * time.Millisecond})
	if f.ClientCPU != 1000 || f.ServiceCPU != 0 || f.PostgresCPU != 500 {
		t.Errorf("got client %g, service %g, postgres %g us a request; want 1000, 0, 500", f.ClientCPU, f.ServiceCPU, f.PostgresCPU)
	}
	if got := f.cpuSplit(); got != "- + 500 + 1000 = 1500 us" {
		t.Errorf("split %q", got)
	}
}
