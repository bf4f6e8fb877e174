package load

import (
	"context"
	"fmt"
	"net/http"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
	"time"
)

// On a machine that the service, its PostgreSQL and the load generator
// share, the rate one kind of request reaches follows what a request costs
// all three, so an attack reports the processor time each spent per
// request beside its rate.

// cpuTimes is the processor time (user and system) used so far by this
// process, the service and PostgreSQL; a negative figure was not read.
type cpuTimes struct {
	client, service, postgres time.Duration
}

// readCPUTimes reads the service's time from its /metrics and PostgreSQL's
// from /proc (the server process and its children, when cfg names its
// process id).
func readCPUTimes(ctx context.Context, cfg Config) cpuTimes {
	t := cpuTimes{client: ownCPU(), service: -1, postgres: -1}
	if s, err := metricValue(ctx, &http.Client{Timeout: 10 * time.Second}, cfg.BaseURL+"/metrics", "process_cpu_seconds_total "); err == nil {
		t.service = time.Duration(s * float64(time.Second))
	}
	if cfg.PostgresPID > 0 {
		if d, err := processTreeCPU("/proc", cfg.PostgresPID); err == nil {
			t.postgres = d
		}
	}
	return t
}

// perRequest sets f's CPU figures from readings before and after its
// requests, in microseconds a request.
func (f *Figures) perRequest(before, after cpuTimes) {
	if f.Requests == 0 {
		return
	}
	us := func(a, b time.Duration) float64 {
		if a < 0 || b < 0 {
			return 0
		}
		return float64(b-a) / float64(time.Microsecond) / float64(f.Requests)
	}
	f.ClientCPU, f.ServiceCPU, f.PostgresCPU = us(before.client, after.client), us(before.service, after.service), us(before.postgres, after.postgres)
}

func ownCPU() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return -1
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// clockTicks is Linux's USER_HZ, the unit of /proc/<pid>/stat's times: 100
// on every architecture Go supports there.
const clockTicks = 100

// processTreeCPU is the processor time of process pid and of its children
// (a PostgreSQL server's backends are children of its first process), as
// proc (a /proc) reports them. Children that have ended are not counted
// (PostgreSQL's connections of a pool stay for the run).
func processTreeCPU(proc string, pid int) (time.Duration, error) {
	entries, err := os.ReadDir(proc)
	if err != nil {
		return 0, fmt.Errorf("read %s: %w", proc, err)
	}
	var ticks int64
	found := false
	for _, e := range entries {
		id, err := strconv.Atoi(e.Name())
		if err != nil {
			continue
		}
		line, err := os.ReadFile(filepath.Join(proc, e.Name(), "stat"))
		if err != nil {
			continue // ended meanwhile
		}
		ppid, t, err := parseStat(string(line))
		if err != nil {
			return 0, fmt.Errorf("%s/%d/stat: %w", proc, id, err)
		}
		if id == pid || ppid == pid {
			found = found || id == pid
			ticks += t
		}
	}
	if !found {
		return 0, fmt.Errorf("no process %d in %s", pid, proc)
	}
	return time.Duration(ticks) * time.Second / clockTicks, nil
}

// parseStat reads the parent and the user plus system ticks of a
// /proc/<pid>/stat line. The command name, in parentheses, may itself hold
// spaces and parentheses: fields are counted after its last ')'.
func parseStat(line string) (ppid int, ticks int64, err error) {
	end := strings.LastIndexByte(line, ')')
	if end < 0 {
		return 0, 0, fmt.Errorf("no command name in %q", line)
	}
	// After the name: state (field 3), ppid (4), ... utime (14), stime (15).
	fields := strings.Fields(line[end+1:])
	if len(fields) < 13 {
		return 0, 0, fmt.Errorf("%d fields after the command name, want at least 13", len(fields))
	}
	if ppid, err = strconv.Atoi(fields[1]); err != nil {
		return 0, 0, fmt.Errorf("parent: %w", err)
	}
	for _, f := range fields[11:13] {
		n, err := strconv.ParseInt(f, 10, 64)
		if err != nil {
			return 0, 0, fmt.Errorf("ticks: %w", err)
		}
		ticks += n
	}
	return ppid, ticks, nil
}
