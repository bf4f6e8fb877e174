package main

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
	workerFlags := []string{
		flagDatabaseURL, flagListen, flagLogFormat, flagLogLevel, flagPollInterval, flagShutdownGrace, flagDBMaxConns, flagPprofListen,
		flagProblemDocs, // the health server answers problems too
		// and bounds slow and idle clients like the API's
		flagReadHeaderTimeout, flagReadTimeout, flagWriteTimeout, flagIdleTimeout, flagMaxHeaderBytes,
		// the worker writes the training history, rolls it up and drops old buckets
		flagHistoryBucket, flagHistoryWindow, flagHistoryFine, flagHistoryFineFor,
		// and trains in batches sized to the backlog, with warm estimates
		flagBatchTarget, flagWarmPairs,
		flagBatchEpisodes, flagEpisodeRetention, flagPruneInterval, flagPruneBatch, flagJobStaleAfter,
	}
	apiFlags := []string{flagMaxBodyBytes, flagMaxEpisodes, flagMaxSteps, flagMaxIDLength, flagMaxStateLength, flagCoverageVisits, flagNoAuth, flagNoWorker}

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
	err := run(context.Background(), []string{"qtally", "worker", "--" + flagMaxBodyBytes, "2048"},
		func(k string) string {
			return map[string]string{"DATABASE_URL": "postgres://127.0.0.1:1/unreachable"}[k]
		}, io.Discard, io.Discard)
	if err == nil || !strings.Contains(err.Error(), "not defined") {
		t.Errorf("qtally worker --%s: %v, want the flag refused as not defined", flagMaxBodyBytes, err)
	}
}
