package storage_test

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

// Shape of the training benchmark: batches of 2000 episodes of 20 steps
// over 25,000 states x 4 actions (100k pairs), as in the training package.
const (
	benchBatch   = 2000
	benchSteps   = 20
	benchStates  = 25_000
	benchActions = 4
	// naivePerBatch is how many episodes of each batch the one-statement-
	// per-step worker trains: it is about 40x slower, so a sample keeps the
	// benchmark short.
	naivePerBatch = 50
)

func benchSettings() training.Settings {
	s := training.DefaultSettings()
	s.Actions = []string{"retry_card", "wait", "email_reminder", "text_reminder"}
	s.Gamma, s.Alpha = 0.99, 0.05
	// Every visit: both workers then make exactly one update per step.
	s.Visit = training.EveryVisit
	return s
}

func benchEpisodes(n int) []training.Episode {
	rng := rand.New(rand.NewPCG(1, 2))
	actions := benchSettings().Actions
	eps := make([]training.Episode, n)
	for i := range eps {
		ep := training.Episode{ID: fmt.Sprintf("bench-%d", i), Steps: make([]training.Step, benchSteps)}
		for t := range ep.Steps {
			s := rng.IntN(benchStates)
			ep.Steps[t] = training.Step{State: fmt.Sprintf("tier=%d|day=%d|reason=%d", s%7, (s/7)%30, s/210),
				Action: actions[rng.IntN(len(actions))], Reward: float64(rng.IntN(200)-50) / 10}
		}
		eps[i] = ep
	}
	return eps
}

func ingestForBench(b *testing.B, db *storage.DB, policy string, eps []training.Episode) {
	b.Helper()
	ctx := context.Background()
	for len(eps) > 0 {
		n := min(len(eps), 1000)
		if _, err := db.Ingest(ctx, policy, eps[:n]); err != nil {
			b.Fatal(err)
		}
		eps = eps[n:]
	}
}

func trainOne(b *testing.B, db *storage.DB) training.BatchReport {
	b.Helper()
	report, trained, err := db.TrainBatch(context.Background(), training.BatchLimits{Episodes: benchBatch}, training.Learn)
	if err != nil || !trained {
		b.Fatalf("train batch: trained %v, %v", trained, err)
	}
	return report
}

// BenchmarkTrainBatchVersusNaive compares the worker's set-based batch
// (storage.TrainBatch: read the batch and its estimates, learn in memory,
// one upsert for every pair) with a worker that writes one UPSERT per
// update, each its own durable commit, as a straightforward implementation
// would. Both train the same episodes from the same table state on a
// durable PostgreSQL (fsync and synchronous_commit on). One iteration is one
// 2000-episode batch for the real worker and 50 of its episodes for the
// one-statement-per-step worker.
func BenchmarkTrainBatchVersusNaive(b *testing.B) {
	ctx := context.Background()
	srv := pgtest.NewDurableServer(b)
	db, err := storage.Open(ctx, srv.URL(), 4, training.DefaultLimits())
	if err != nil {
		b.Fatal(err)
	}
	defer db.Close()
	conn, err := pgx.Connect(ctx, srv.URL())
	if err != nil {
		b.Fatal(err)
	}
	defer conn.Close(ctx)

	eps := benchEpisodes(benchBatch * (1 + b.N))
	warm, timed := eps[:benchBatch], eps[benchBatch:]
	sample := make([]training.Episode, 0, naivePerBatch*b.N)
	for i := range b.N {
		sample = append(sample, timed[i*benchBatch:i*benchBatch+naivePerBatch]...)
	}

	// The real worker: a warm-up batch fills the table, then b.N batches.
	// TrainBatch picks any policy with a backlog, so each policy gets its
	// episodes only when it is the one to train.
	for _, name := range []string{"batched", "naive"} {
		if _, _, err = db.PutPolicy(ctx, name, benchSettings()); err != nil {
			b.Fatal(err)
		}
	}
	ingestForBench(b, db, "batched", warm)
	trainOne(b, db)
	ingestForBench(b, db, "batched", timed)
	b.ResetTimer()
	start := time.Now()
	steps := 0
	for range b.N {
		steps += trainOne(b, db).Result.Steps
	}
	batchedSecs := time.Since(start).Seconds()
	b.StopTimer()

	// The one-statement-per-step worker starts from the same table state:
	// the same warm-up batch trained by the real worker.
	ingestForBench(b, db, "naive", warm)
	trainOne(b, db)
	ingestForBench(b, db, "naive", sample)
	p, err := db.PolicyByName(ctx, "naive")
	if err != nil {
		b.Fatal(err)
	}
	start = time.Now()
	naiveSteps, err := trainNaively(ctx, conn, p)
	if err != nil {
		b.Fatal(err)
	}
	naiveSecs := time.Since(start).Seconds()
	if naiveSteps != len(sample)*benchSteps {
		b.Fatalf("naive worker trained %d steps, want %d", naiveSteps, len(sample)*benchSteps)
	}
	checkNaiveEstimates(b, conn, p, warm, sample)

	batched, naive := float64(steps)/batchedSecs, float64(naiveSteps)/naiveSecs
	b.ReportMetric(batched, "batched-steps/s")
	b.ReportMetric(naive, "naive-steps/s")
	b.ReportMetric(batched/naive, "speedup")
}

// Statements of the one-statement-per-step worker.
const (
	naiveEpisodes = `SELECT seq, states, actions, rewards FROM episodes
		WHERE policy_id = $1 AND seq > (SELECT trained_through FROM policies WHERE policy_id = $1) ORDER BY seq`
	naiveUpsert = `INSERT INTO q_values AS t (policy_id, state, action, q, visits, last_delta, updated_at, revision)
		VALUES ($1, $2, $3, $4::float8 + $5::float8 * ($6::float8 - $4::float8), 1, $5::float8 * ($6::float8 - $4::float8), now(), 0)
		ON CONFLICT (policy_id, state, action) DO UPDATE
		SET q = t.q + $5::float8 * ($6::float8 - t.q), visits = t.visits + 1,
		    last_delta = $5::float8 * ($6::float8 - t.q), updated_at = now()`
	naiveMark = `UPDATE policies SET trained_through = $2 WHERE policy_id = $1`
)

// trainNaively trains a policy's backlog with one autocommit statement per
// update (every visit), the returns computed backwards, then advances the
// training watermark past each episode.
func trainNaively(ctx context.Context, conn *pgx.Conn, p training.Policy) (int, error) {
	rows, err := conn.Query(ctx, naiveEpisodes, p.ID)
	if err != nil {
		return 0, err
	}
	type episode struct {
		seq     int64
		states  []string
		actions []int16
		rewards []float64
	}
	eps, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (episode, error) {
		var ep episode
		return ep, r.Scan(&ep.seq, &ep.states, &ep.actions, &ep.rewards)
	})
	if err != nil {
		return 0, err
	}
	steps := 0
	for _, ep := range eps {
		returns := training.Returns(ep.rewards, p.Gamma, nil)
		for t := len(ep.states) - 1; t >= 0; t-- {
			if _, err := conn.Exec(ctx, naiveUpsert, p.ID, ep.states[t], ep.actions[t], p.InitialQ, p.Alpha, returns[t]); err != nil {
				return steps, err
			}
			steps++
		}
		if _, err := conn.Exec(ctx, naiveMark, p.ID, ep.seq); err != nil {
			return steps, err
		}
	}
	return steps, nil
}

// checkNaiveEstimates makes sure the naive worker did the same work as
// the real one would: its table must hold what training.Learn computes for
// the warm-up batch followed by the sample.
func checkNaiveEstimates(b *testing.B, conn *pgx.Conn, p training.Policy, batches ...[]training.Episode) {
	b.Helper()
	want := map[training.PairKey]training.Estimate{}
	for _, eps := range batches {
		records, err := training.ValidateAndEncodeEpisodes(p.Settings, eps, training.DefaultLimits())
		if err != nil {
			b.Fatal(err)
		}
		stored := make([]training.StoredEpisode, len(records))
		for i, r := range records {
			stored[i] = training.StoredEpisode{EpisodeRecord: r}
		}
		for _, pr := range training.Learn(training.BatchInput{Policy: p, Episodes: stored, Current: want}).Pairs {
			want[pr.PairKey] = pr.Estimate
		}
	}
	rows, err := conn.Query(context.Background(), `SELECT state, action, q, visits FROM q_values WHERE policy_id = $1`, p.ID)
	if err != nil {
		b.Fatal(err)
	}
	var k training.PairKey
	var q float64
	var visits int64
	n := 0
	_, err = pgx.ForEachRow(rows, []any{&k.State, &k.Action, &q, &visits}, func() error {
		n++
		if w, ok := want[k]; !ok || math.Abs(w.Q-q) > 1e-9 || w.Visits != visits {
			return fmt.Errorf("pair %v: naive worker stored q=%v visits=%d, want %+v", k, q, visits, w)
		}
		return nil
	})
	if err != nil {
		b.Fatal(err)
	}
	if n != len(want) {
		b.Fatalf("naive worker stored %d pairs, want %d", n, len(want))
	}
}
