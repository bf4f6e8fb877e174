package systemtest

import (
	"context"
	"io"
	"slices"
	"strings"
	"testing"
)

// `worker --help` lists only what a worker process reads: no request
// limits, coverage threshold or token settings, which only the API uses.
// serve, which runs both roles, keeps all of them.
func TestWorkerHelpListsOnlyWhatTheWorkerReads(t *testing.T) {
	t.Parallel()
	workerFlags := []string{
		"database-url", "listen", "log-format", "log-level", "poll-interval", "shutdown-grace", "db-max-conns", "pprof-listen", "heap-headroom",
		"problem-docs", // the health server answers problems too
		// and bounds slow and idle clients like the API's
		"read-header-timeout", "read-timeout", "write-timeout", "idle-timeout", "max-header-bytes",
		// the worker writes the training history, rolls it up and drops old buckets
		"history-bucket", "history-window", "history-fine-bucket", "history-fine-window",
		// and trains in batches sized to the backlog, with warm estimates
		"batch-target", "warm-pairs",
		"batch-episodes", "batch-steps", "episode-retention", "prune-interval", "prune-batch", "job-stale-after",
	}
	apiFlags := []string{"max-body-bytes", "max-episodes-per-request", "max-steps", "max-id-length", "max-state-length", "coverage-visits", "no-auth", "no-worker"}

	worker := readCommandHelp(t, "worker")
	var got []string
	for name := range worker.flags {
		got = append(got, name)
	}
	slices.Sort(got)
	want := slices.Clone(workerFlags)
	slices.Sort(want)
	if !slices.Equal(got, want) {
		t.Errorf("qtally worker --help lists %q, want exactly %q", got, want)
	}

	serve := readCommandHelp(t, "serve")
	for _, name := range append(slices.Clone(workerFlags), apiFlags...) {
		if _, ok := serve.flags[name]; !ok {
			t.Errorf("qtally serve --help lacks --%s", name)
		}
	}

	// The worker refuses what it does not read, rather than ignoring it.
	err := run(context.Background(), []string{"qtally", "worker", "--max-body-bytes", "2048"},
		func(k string) string {
			return map[string]string{"DATABASE_URL": "postgres://127.0.0.1:1/unreachable"}[k]
		}, io.Discard, io.Discard)
	if err == nil || !strings.Contains(err.Error(), "not defined") {
		t.Errorf("qtally worker --%s: %v, want the flag refused as not defined", "max-body-bytes", err)
	}
}
