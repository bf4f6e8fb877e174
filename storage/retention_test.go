package storage_test

import (
	"context"
	"encoding/json"
	"fmt"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/internal/jobs"
	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

// A queued replay or evaluation pins the episodes its window held when it
// was queued: pruning keeps them until the job ends, so the job reads them
// all however late it runs; after it ends they are pruned like the rest.
func TestQueuedJobsPinTheirEpisodes(t *testing.T) {
	ctx := context.Background()
	db := openDB(t)
	if _, _, err := db.PutPolicy(ctx, "renewals", training.Settings{Actions: []string{"a", "b"}, Gamma: 1, Alpha: 0.1, Visit: training.FirstVisit}); err != nil {
		t.Fatal(err)
	}
	half := 0.5
	batch := make([]training.Episode, 10)
	for i := range batch {
		batch[i] = training.Episode{ID: fmt.Sprint(i), Steps: []training.Step{{State: "s", Action: "a", Reward: 1, Probability: &half}}}
	}
	if _, err := db.Ingest(ctx, "renewals", batch); err != nil {
		t.Fatal(err)
	}
	for {
		_, trained, err := db.TrainBatch(ctx, training.BatchLimits{Episodes: 100}, training.Learn)
		if err != nil {
			t.Fatal(err)
		}
		if !trained {
			break
		}
	}
	replay, err := db.QueueReplay(ctx, "renewals", training.ReplayRequest{Target: "renewals-again", Window: training.EpisodeWindow{Last: 4}})
	if err != nil {
		t.Fatal(err)
	}
	evaluation, err := db.QueueEvaluation(ctx, "renewals", training.EvaluationRequest{Target: training.EvaluationTarget{Table: training.LiveTable, Mode: training.Greedy},
		Window: training.EpisodeWindow{Last: 3}, Resamples: 10}.WithDefaults())
	if err != nil {
		t.Fatal(err)
	}
	if replay.Episodes.Episodes != 4 || evaluation.Episodes.Episodes != 3 {
		t.Fatalf("windows hold %d and %d episodes, want 4 and 3", replay.Episodes.Episodes, evaluation.Episodes.Episodes)
	}

	time.Sleep(10 * time.Millisecond) // every episode is older than a 1 ms retention
	pruned, err := db.PruneEpisodes(ctx, time.Millisecond, 3)
	if err != nil {
		t.Fatal(err)
	}
	if pruned["renewals"] != 6 {
		t.Fatalf("pruned %d episodes, want the 6 outside the queued jobs' windows", pruned["renewals"])
	}

	// The jobs run now, and read every episode their windows held.
	for range 2 {
		job, found, claimErr := db.ClaimJob(ctx, time.Minute, 3)
		if claimErr != nil || !found {
			t.Fatalf("claim: %v %v", found, claimErr)
		}
		var result any
		switch job.Kind {
		case jobs.ReplayKind:
			var spec training.ReplayJob
			must(t, json.Unmarshal(job.Spec, &spec))
			res, replayErr := training.Replay(ctx, db, spec, training.BatchLimits{Episodes: 100}, func(training.Progress) {})
			must(t, replayErr)
			if res.EpisodesReplayed != 4 {
				t.Fatalf("the replay read %d episodes, want the 4 of its window", res.EpisodesReplayed)
			}
			result = res
		case jobs.EvaluationKind:
			var spec training.EvaluationJob
			must(t, json.Unmarshal(job.Spec, &spec))
			res, evalErr := training.Evaluate(ctx, db, spec, func(training.Progress) {})
			must(t, evalErr)
			if res.EpisodesRead != 3 {
				t.Fatalf("the evaluation read %d episodes, want the 3 of its window", res.EpisodesRead)
			}
			result = res
		}
		must(t, db.FinishJob(ctx, job, training.Progress{Phase: "done"}, result, ""))
	}

	// Finished jobs pin nothing.
	pruned, err = db.PruneEpisodes(ctx, time.Millisecond, 3)
	if err != nil {
		t.Fatal(err)
	}
	if pruned["renewals"] != 4 {
		t.Fatalf("pruned %d episodes after the jobs ended, want the remaining 4", pruned["renewals"])
	}
}

func must(t *testing.T, err error) {
	t.Helper()
	if err != nil {
		t.Fatal(err)
	}
}

// Queueing a job and pruning at the same moment never leave a job whose
// window lost episodes: either pruning went first and the window never
// held them, or it sees the job and keeps them.
func TestPruningRacingQueuedJobsLosesNoWindowEpisodes(t *testing.T) {
	ctx := context.Background()
	url := pgtest.NewDatabase(t)
	// Every round queues a replay that no runner takes: room for all.
	limits := training.DefaultLimits()
	limits.MaxOpenJobsPerPolicy = 40
	db, err := storage.Open(ctx, url, 20, limits)
	must(t, err)
	t.Cleanup(db.Close)
	conn, err := pgx.Connect(ctx, url)
	must(t, err)
	t.Cleanup(func() { conn.Close(ctx) })
	_, _, err = db.PutPolicy(ctx, "renewals", training.Settings{Actions: []string{"a", "b"}, Gamma: 1, Alpha: 0.1, Visit: training.FirstVisit})
	must(t, err)

	for round := range limits.MaxOpenJobsPerPolicy {
		batch := make([]training.Episode, 10)
		for i := range batch {
			batch[i] = training.Episode{ID: fmt.Sprintf("%d-%d", round, i), Steps: []training.Step{{State: "s", Action: "a", Reward: 1}}}
		}
		_, err := db.Ingest(ctx, "renewals", batch)
		must(t, err)
		for trained := true; trained; {
			_, trained, err = db.TrainBatch(ctx, training.BatchLimits{Episodes: 100}, training.Learn)
			must(t, err)
		}
		time.Sleep(2 * time.Millisecond)
		var wg sync.WaitGroup
		wg.Add(1)
		go func() {
			defer wg.Done()
			if _, pruneErr := db.PruneEpisodes(ctx, time.Millisecond, 1); pruneErr != nil {
				t.Error(pruneErr)
			}
		}()
		job, err := db.QueueReplay(ctx, "renewals", training.ReplayRequest{Target: training.PolicyName(fmt.Sprintf("again-%d", round)), Window: training.EpisodeWindow{Last: 10}})
		wg.Wait()
		if err != nil && strings.Contains(err.Error(), "holds no stored episodes") {
			continue // pruning took every episode first: no window, no job
		}
		must(t, err)
		var kept int64
		must(t, conn.QueryRow(ctx, `SELECT count(*) FROM episodes e JOIN policies p USING (policy_id)
			WHERE p.name = 'renewals' AND e.seq BETWEEN $1 AND $2`, job.Episodes.FirstSeq, job.Episodes.LastSeq).Scan(&kept))
		if kept != job.Episodes.Episodes {
			t.Fatalf("round %d: the queued replay's window held %d episodes, %d are left", round, job.Episodes.Episodes, kept)
		}
	}
}
