package load

import (
	"bufio"
	"bytes"
	"context"
	"fmt"
	"io"
	"net/http"
	"strconv"
	"strings"
	"time"
)

// Process reads the memory of the qtally process under load: its Go heap
// from the profiling server (--pprof-listen) and its resident set from
// /metrics.
type Process struct {
	// PprofURL is the base URL of the process's profiling server.
	PprofURL string
	// BaseURL is the process's API (for /metrics).
	BaseURL string
	http    *http.Client
}

// NewProcess checks that both URLs are on this machine.
func NewProcess(pprofURL, baseURL string) (*Process, error) {
	for _, u := range []string{pprofURL, baseURL} {
		if err := checkLoopback(u); err != nil {
			return nil, err
		}
	}
	return &Process{PprofURL: strings.TrimRight(pprofURL, "/"), BaseURL: strings.TrimRight(baseURL, "/"),
		http: &http.Client{Timeout: time.Minute}}, nil
}

// MemoryReading is one reading of a process's memory.
type MemoryReading struct {
	// HeapBytes is the Go heap in use right after a forced collection:
	// what the process keeps alive.
	HeapBytes uint64 `json:"heap_bytes"`
	// RSSBytes is the resident set the kernel reports.
	RSSBytes uint64 `json:"rss_bytes"`
}

// Read collects garbage in the process (the heap profile's gc=1), then
// reads its live heap and its resident set.
func (p *Process) Read(ctx context.Context) (MemoryReading, error) {
	heap, err := metricValue(ctx, p.http, p.PprofURL+"/debug/pprof/heap?gc=1&debug=1", "# HeapAlloc = ")
	if err != nil {
		return MemoryReading{}, err
	}
	rss, err := metricValue(ctx, p.http, p.BaseURL+"/metrics", "process_resident_memory_bytes ")
	if err != nil {
		return MemoryReading{}, err
	}
	return MemoryReading{HeapBytes: uint64(heap), RSSBytes: uint64(rss)}, nil
}

// metricValue finds the first line of url's body that starts with prefix
// and parses the number after it.
func metricValue(ctx context.Context, c *http.Client, url, prefix string) (float64, error) {
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, url, nil)
	if err != nil {
		return 0, err
	}
	resp, err := c.Do(req)
	if err != nil {
		return 0, err
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(resp.Body)
	if err != nil {
		return 0, err
	}
	if resp.StatusCode != http.StatusOK {
		return 0, fmt.Errorf("GET %s: status %d", url, resp.StatusCode)
	}
	sc := bufio.NewScanner(bytes.NewReader(body))
	sc.Buffer(make([]byte, 64<<10), 4<<20)
	for sc.Scan() {
		if rest, ok := strings.CutPrefix(sc.Text(), prefix); ok {
			return strconv.ParseFloat(strings.TrimSpace(rest), 64)
		}
	}
	return 0, fmt.Errorf("GET %s: no line starting %q", url, prefix)
}
