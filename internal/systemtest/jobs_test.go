package systemtest

import (
	"fmt"
	"math"
	"testing"
	"time"

	"github.com/qtally/qtally/storage/pgtest"
)

// A job whose process dies mid-run is taken over by another process once
// its heartbeat is older than --job-stale-after, and any API process can
// report on it meanwhile.
func TestAJobWhoseRunnerDiesIsTakenOver(t *testing.T) {
	t.Parallel()
	db := pgtest.NewDatabase(t)
	bin := buildBinary(t)
	env := map[string]string{"DATABASE_URL": db, "QTALLY_LISTEN": "127.0.0.1:0", "QTALLY_POLL_INTERVAL": "300ms",
		"QTALLY_JOB_STALE_AFTER": "3s", "QTALLY_MAX_EPISODES_PER_REQUEST": "20000"}
	first := startProcess(t, bin, env, "serve")
	reader := startProcess(t, bin, env, "serve", "--no-worker")
	s, r := first.api(), reader.api()

	// The target is the empty table's greedy policy: with untried actions
	// allowed to be greedy it ties both actions, so every ratio is
	// 0.5 / 0.5 = 1 and the bootstrap has no shortcut.
	s.call("PUT", "/v1/policies/queue", map[string]any{"actions": []string{"now", "later"}, "gamma": 1, "greedy_untried": true}, 201)
	s.call("POST", "/v1/policies/queue/snapshots", map[string]any{"name": "blank"}, 201)
	half := 0.5
	eps := make([]episodeJSON, 20000)
	sum := 0.0
	for i := range eps {
		reward := float64(i % 7)
		sum += reward
		eps[i] = episodeJSON{ID: fmt.Sprint(i), Steps: []stepJSON{{State: "busy", Action: []string{"now", "later"}[i%2], Reward: reward, Probability: &half}}}
	}
	s.send("POST", "/v1/policies/queue/episodes", "application/x-ndjson", ndjson(t, eps), false)
	var job jobView[evaluationResult]
	resp := s.call("POST", "/v1/policies/queue/evaluations", map[string]any{"target": map[string]any{"table": "blank"}, "resamples": 10000, "seed": 11}, 202)
	resp.decode(t, &job)
	loc := resp.Header.Get("Location")
	waitFor(t, time.Minute, "the job to reach its bootstrap", func() bool {
		r.call("GET", loc, nil, 200).decode(t, &job) // read through the other process
		if job.Status == "succeeded" {
			t.Fatal("the job ended before it could be interrupted; make it longer")
		}
		return job.Progress.Phase == "bootstrap" && job.Progress.Done > 0
	})
	first.kill()
	stuck := job.Progress
	r.call("GET", loc, nil, 200).decode(t, &job)
	if job.Status != "running" {
		t.Fatalf("after the kill: %+v", job)
	}

	startProcess(t, bin, env, "serve")
	start := time.Now()
	waitFor(t, 3*time.Minute, "another process to take the job over and finish it", func() bool {
		r.call("GET", loc, nil, 200).decode(t, &job)
		return job.Status == "succeeded" || job.Status == "failed"
	})
	t.Logf("interrupted at %+v; finished %v after the restart", stuck, time.Since(start))
	if job.Status != "succeeded" || job.Result.EpisodesUsed != 20000 || math.Abs(job.Result.Ordinary.Estimate-sum/20000) > 1e-12 ||
		job.Result.Weighted.Estimate != job.Result.Ordinary.Estimate || job.Result.ZeroWeightEpisodes != 0 {
		t.Fatalf("taken-over job: %s %s %+v", job.Status, job.Error, job.Result)
	}
}
