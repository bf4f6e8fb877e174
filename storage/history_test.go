package storage_test

import (
	"context"
	"fmt"
	"math"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

type historyRow struct {
	Start                        time.Time
	Batches, Episodes, Steps     int64
	SumReturn, SumAbsDelta       float64
	Updates, GreedyChanges       int64
	NewStates, NewPairs, Backlog int64
}

func readHistory(t *testing.T, conn *pgx.Conn) []historyRow {
	t.Helper()
	rows, err := conn.Query(context.Background(), `
		SELECT bucket_start, batches, episodes, steps, sum_return, sum_abs_delta, updates, greedy_changes,
		       new_states, new_pairs, coalesce(backlog, -1)
		FROM training_history ORDER BY bucket_start, fine`)
	if err != nil {
		t.Fatal(err)
	}
	out, err := pgx.CollectRows(rows, pgx.RowToStructByPos[historyRow])
	if err != nil {
		t.Fatal(err)
	}
	return out
}

// openWithConn opens a store on a fresh database and a plain connection
// to look at its tables.
func openWithConn(t *testing.T) (*storage.DB, *pgx.Conn) {
	t.Helper()
	url := pgtest.NewDatabase(t)
	db, err := storage.Open(context.Background(), url, 4, training.DefaultLimits())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(db.Close)
	conn, err := pgx.Connect(context.Background(), url)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close(context.Background()) })
	return db, conn
}

// setup opens a store on a fresh database, with one policy, and a plain
// connection to look at the tables.
func setup(t *testing.T, h storage.HistorySettings) (*storage.DB, *pgx.Conn) {
	t.Helper()
	ctx := context.Background()
	db, conn := openWithConn(t)
	if err := db.SetHistory(h); err != nil {
		t.Fatal(err)
	}
	if _, _, err := db.PutPolicy(ctx, "parcels", training.Settings{Actions: []string{"van", "bike"}, Gamma: 0.5, Alpha: 0.5, Visit: training.FirstVisit}); err != nil {
		t.Fatal(err)
	}
	return db, conn
}

func ingest(t *testing.T, db *storage.DB, prefix string, n int) {
	t.Helper()
	eps := make([]training.Episode, n)
	for i := range eps {
		eps[i] = training.Episode{ID: fmt.Sprintf("%s-%d", prefix, i), Steps: []training.Step{
			{State: fmt.Sprintf("zone %d", i%4), Action: []string{"van", "bike"}[i%2], Reward: float64(i)},
			{State: "depot", Action: "van", Reward: 1},
		}}
	}
	if _, err := db.Ingest(context.Background(), "parcels", eps); err != nil {
		t.Fatal(err)
	}
}

func train(t *testing.T, db *storage.DB, max int) training.BatchReport {
	t.Helper()
	report, found, err := db.TrainBatch(context.Background(), training.BatchLimits{Episodes: max}, training.Learn)
	if err != nil || !found {
		t.Fatalf("train: found %v, %v", found, err)
	}
	return report
}

// Batches in one bucket add up in one row, written with the batch; the
// first batch samples the backlog.
func TestHistoryAddsBatchesOfABucket(t *testing.T) {
	// Buckets so long that the test cannot straddle two.
	db, conn := setup(t, storage.HistorySettings{FineBucket: 1000 * time.Hour, FineWindow: 2000 * time.Hour, Bucket: 1000 * time.Hour, Window: 2000 * time.Hour})
	ingest(t, db, "a", 10)
	var want historyRow
	for range 3 {
		r := train(t, db, 4)
		want.Batches++
		want.Episodes += int64(r.Episodes)
		want.Steps += int64(r.Result.Steps)
		want.Updates += int64(len(r.Result.AbsDeltas))
		want.GreedyChanges += int64(r.Result.GreedyChanges)
		for _, g := range r.Result.EpisodeReturns {
			want.SumReturn += g
		}
		for _, d := range r.Result.AbsDeltas {
			want.SumAbsDelta += d
		}
		rows := readHistory(t, conn)
		if len(rows) != 1 || rows[0].Backlog != 6 || rows[0].Batches != want.Batches {
			t.Fatalf("history after batch %d: %+v; want one row with the backlog after the first batch, 6", want.Batches, rows)
		}
	}
	got := readHistory(t, conn)[0]
	// Zones 0 and 2 only see vans, 1 and 3 only bikes, the depot vans:
	// five states, five pairs.
	want.NewStates, want.NewPairs, want.Backlog, want.Start = 5, 5, 6, got.Start
	near := func(a, b float64) bool { return math.Abs(a-b) <= 1e-9*math.Max(1, math.Abs(b)) }
	if !near(got.SumReturn, want.SumReturn) || !near(got.SumAbsDelta, want.SumAbsDelta) {
		t.Fatalf("history row %+v, want %+v", got, want)
	}
	got.SumReturn, got.SumAbsDelta = want.SumReturn, want.SumAbsDelta
	if got != want || got.Episodes != 10 || got.Steps != 20 {
		t.Fatalf("history row %+v, want %+v from 10 episodes of 2 steps", got, want)
	}
	var status struct{ states, pairs int64 }
	if err := conn.QueryRow(context.Background(), `SELECT count(DISTINCT state), count(*) FROM q_values`).Scan(&status.states, &status.pairs); err != nil {
		t.Fatal(err)
	}
	if status.states != got.NewStates || status.pairs != got.NewPairs {
		t.Fatalf("the table has %d states and %d pairs; history says %d and %d are new", status.states, status.pairs, got.NewStates, got.NewPairs)
	}
}

// The worker drops buckets that left the window as it writes new ones, and
// the report works coverage back from today's counts.
func TestHistoryKeepsOnlyTheWindow(t *testing.T) {
	db, conn := setup(t, storage.HistorySettings{FineBucket: time.Second, FineWindow: 2 * time.Second, Bucket: time.Second, Window: 3 * time.Second})
	for i := range 6 {
		if i > 0 {
			time.Sleep(1100 * time.Millisecond)
		}
		ingest(t, db, fmt.Sprint("b", i), 2+i)
		train(t, db, 1000)
	}
	rows := readHistory(t, conn)
	if len(rows) == 0 || len(rows) > 4 {
		t.Fatalf("%d history rows kept with a window of 3 one-second buckets: %+v", len(rows), rows)
	}
	// The last batch dropped every bucket that started more than the window
	// before its own transaction's time.
	var lastBatch time.Time
	if err := conn.QueryRow(context.Background(), `SELECT max(last_batch_at) FROM training_history`).Scan(&lastBatch); err != nil {
		t.Fatal(err)
	}
	for _, r := range rows {
		if age := lastBatch.Sub(r.Start); age > 3*time.Second {
			t.Fatalf("a bucket starting %v before the last batch was kept with a window of 3s", age)
		}
	}

	report, err := db.PolicyReport(context.Background(), "parcels", time.Minute, 3)
	if err != nil {
		t.Fatal(err)
	}
	points := report.Timeline(180).Points
	if len(points) != len(rows) {
		t.Fatalf("the report has %d points for %d stored buckets", len(points), len(rows))
	}
	last := points[len(points)-1]
	if last.States != report.Status.States || last.Pairs != report.Status.Pairs {
		t.Fatalf("coverage ends at %d states, %d pairs; the policy has %d and %d", last.States, last.Pairs, report.Status.States, report.Status.Pairs)
	}
	if len(report.MostVisited) != 3 || report.MostVisited[0].State != "depot" {
		t.Fatalf("most visited: %+v", report.MostVisited)
	}
}

// Fine rows that leave the fine window are rolled up into coarse rows as
// the worker writes: nothing is lost or counted twice, coarse rows are
// whole coarse buckets, and the fine rows stay within their bound.
func TestHistoryRollsFineRowsUpIntoCoarseOnes(t *testing.T) {
	h := storage.HistorySettings{FineBucket: 100 * time.Millisecond, FineWindow: 500 * time.Millisecond, Bucket: time.Second, Window: time.Hour}
	db, conn := setup(t, h)
	var want historyRow
	for i := range 16 {
		time.Sleep(150 * time.Millisecond)
		ingest(t, db, fmt.Sprint("b", i), 3)
		r := train(t, db, 1000)
		want.Batches++
		want.Episodes += int64(r.Episodes)
		want.Steps += int64(r.Result.Steps)
		for _, g := range r.Result.EpisodeReturns {
			want.SumReturn += g
		}
	}
	ctx := context.Background()
	var got historyRow
	var fine, coarse, misaligned, tooOld int64
	err := conn.QueryRow(ctx, `
		SELECT sum(batches)::bigint, sum(episodes)::bigint, sum(steps)::bigint, sum(sum_return),
		       sum(new_states)::bigint, sum(new_pairs)::bigint,
		       count(*) FILTER (WHERE fine), count(*) FILTER (WHERE NOT fine),
		       count(*) FILTER (WHERE NOT fine AND bucket_start <> date_trunc('second', bucket_start)),
		       count(*) FILTER (WHERE fine AND bucket_start < (SELECT max(last_batch_at) FROM training_history) - interval '500 milliseconds')
		FROM training_history`).Scan(&got.Batches, &got.Episodes, &got.Steps, &got.SumReturn, &got.NewStates, &got.NewPairs,
		&fine, &coarse, &misaligned, &tooOld)
	if err != nil {
		t.Fatal(err)
	}
	if got.Batches != want.Batches || got.Episodes != want.Episodes || got.Steps != want.Steps || math.Abs(got.SumReturn-want.SumReturn) > 1e-9*math.Abs(want.SumReturn) {
		t.Fatalf("history sums to %+v after rolling up; the batches trained %+v", got, want)
	}
	var states, pairs int64
	if err := conn.QueryRow(ctx, `SELECT count(DISTINCT state), count(*) FROM q_values`).Scan(&states, &pairs); err != nil {
		t.Fatal(err)
	}
	if got.NewStates != states || got.NewPairs != pairs {
		t.Fatalf("history counts %d new states and %d new pairs; the table has %d and %d", got.NewStates, got.NewPairs, states, pairs)
	}
	if coarse == 0 || misaligned != 0 {
		t.Fatalf("%d coarse rows, %d of them not whole seconds; want some, all whole", coarse, misaligned)
	}
	if tooOld != 0 || fine > int64(h.FineWindow/h.FineBucket)+1 {
		t.Fatalf("%d fine rows, %d older than the fine window at the last write", fine, tooOld)
	}
	// The backlog is sampled at most every training.BacklogSampleEvery, less
	// a coarse bucket when the last sample was rolled up (its row starts
	// earlier), over however long the batches spanned.
	var sampled int64
	var spanned time.Duration
	if err := conn.QueryRow(ctx, `SELECT count(backlog), max(last_batch_at) - min(bucket_start) FROM training_history`).Scan(&sampled, &spanned); err != nil {
		t.Fatal(err)
	}
	if most := 1 + int64(spanned/(training.BacklogSampleEvery-h.Bucket)); sampled < 1 || sampled > most {
		t.Fatalf("%d backlog samples over %v of training; want 1 to %d", sampled, spanned, most)
	}
}
