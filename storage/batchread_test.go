package storage_test

import (
	"context"
	"fmt"
	"testing"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/training"
)

// A training batch reads its episodes, not the policy's whole backlog,
// whatever the planner believes about the table. The counter-example: a
// new policy's 50,000 episodes stored after the table's statistics were
// gathered (autovacuum analyses a large table only after a tenth of it
// changed) looked like one row to the planner, which re-ran the batch's
// range search once per backlog row: one batch read took 27 s. The check
// counts the rows the read's plan touched, for the plan made for the
// values and the generic plan used after a few executions.
func TestBatchReadTouchesItsBatchWhateverTheStatistics(t *testing.T) {
	ctx := context.Background()
	db, conn := openWithConn(t)
	// Statistics change only when this test says so.
	must(t, exec(ctx, conn, `ALTER TABLE episodes SET (autovacuum_enabled = false)`))

	settings := training.Settings{Actions: []string{"wait", "remind"}, Gamma: 0.9, Alpha: 0.1, Visit: training.FirstVisit}
	store := func(policy string, n int) training.Policy {
		p, _, err := db.PutPolicy(ctx, policy, settings)
		must(t, err)
		for from := 0; from < n; from += 500 {
			eps := make([]training.Episode, 500)
			for i := range eps {
				eps[i] = training.Episode{ID: fmt.Sprintf("%s-%d", policy, from+i), Steps: []training.Step{
					{State: "overdue", Action: "remind", Reward: 0}, {State: "paid", Action: "wait", Reward: 1}}}
			}
			_, err := db.Ingest(ctx, policy, eps)
			must(t, err)
		}
		return p
	}
	const batch = 100
	check := func(p training.Policy, when string) {
		t.Helper()
		for _, generic := range []bool{false, true} {
			examined, err := db.RowsExaminedByBatchRead(ctx, p.ID, 0, training.BatchLimits{Episodes: batch, Steps: 1 << 20}, generic)
			must(t, err)
			if examined > 6*batch {
				t.Errorf("%s, generic plan %v: reading a batch of %d episodes touched %d rows; want at most %d", when, generic, batch, examined, 6*batch)
			}
		}
	}
	invoices := store("invoices", 1000)
	check(invoices, "no statistics yet")
	must(t, exec(ctx, conn, `ANALYZE episodes`))
	renewals := store("renewals", 5000)
	check(renewals, "statistics from before the backlog")
	must(t, exec(ctx, conn, `ANALYZE episodes`))
	check(renewals, "statistics of the backlog")
}

func exec(ctx context.Context, conn *pgx.Conn, sql string) error {
	_, err := conn.Exec(ctx, sql)
	return err
}

// Reading every policy's backlog (the metrics' backlog gauges, at every
// scrape) counts the untrained episodes, not every stored one: the
// counter-example read the whole table, trained episodes of every policy
// included.
func TestBacklogsCountOnlyUntrainedEpisodes(t *testing.T) {
	ctx := context.Background()
	db := openDB(t)
	settings := training.Settings{Actions: []string{"wait", "remind"}, Gamma: 0.9, Alpha: 0.1, Visit: training.FirstVisit}
	for _, policy := range []string{"invoices", "renewals"} {
		if _, _, err := db.PutPolicy(ctx, policy, settings); err != nil {
			t.Fatal(err)
		}
	}
	store := func(policy string, from, n int) {
		t.Helper()
		eps := make([]training.Episode, n)
		for i := range eps {
			eps[i] = training.Episode{ID: fmt.Sprintf("%s-%d", policy, from+i), Steps: []training.Step{
				{State: "overdue", Action: "remind", Reward: 0}, {State: "paid", Action: "wait", Reward: 1}}}
		}
		_, err := db.Ingest(ctx, policy, eps)
		must(t, err)
	}
	for from := 0; from < 4000; from += 500 {
		store("invoices", from, 500)
	}
	for {
		_, found, err := db.TrainBatch(ctx, training.BatchLimits{Episodes: 10000}, training.Learn)
		must(t, err)
		if !found {
			break
		}
	}
	store("invoices", 4000, 30)
	store("renewals", 0, 70)
	backlogs, err := db.Backlogs(ctx)
	must(t, err)
	if len(backlogs) != 2 || backlogs[0].Episodes != 30 || backlogs[1].Episodes != 70 {
		t.Fatalf("backlogs %+v; want invoices 30 and renewals 70", backlogs)
	}
	const untrained = 100
	for _, generic := range []bool{false, true} {
		examined, err := db.RowsExaminedByBacklogs(ctx, generic)
		must(t, err)
		if examined > 4*untrained {
			t.Errorf("generic plan %v: reading the backlogs touched %d rows; %d episodes are untrained, 4,000 trained", generic, examined, untrained)
		}
	}
}

// A batch takes episodes in arrival order until it holds its episode
// limit or at least its step bound: the episode that crosses the bound is
// the batch's last.
func TestTrainingBatchStopsAtItsStepBound(t *testing.T) {
	ctx := context.Background()
	db := openDB(t)
	settings := training.Settings{Actions: []string{"wait", "remind"}, Gamma: 0.9, Alpha: 0.1, Visit: training.FirstVisit}
	if _, _, err := db.PutPolicy(ctx, "renewals", settings); err != nil {
		t.Fatal(err)
	}
	lengths := []int{30, 1, 40, 5, 5, 5, 100, 2, 2}
	eps := make([]training.Episode, len(lengths))
	for i, n := range lengths {
		eps[i].ID = fmt.Sprintf("renewal-%d", i)
		for range n {
			eps[i].Steps = append(eps[i].Steps, training.Step{State: "overdue", Action: "remind", Reward: 1})
		}
	}
	_, err := db.Ingest(ctx, "renewals", eps)
	must(t, err)
	limits := training.BatchLimits{Episodes: 5, Steps: 50}
	// 30+1 < 50, then 40 makes 71: stop. 5+5+5 = 15, then 100: stop at
	// 115. 2+2: the rest.
	for i, want := range []struct{ episodes, steps int }{{3, 71}, {4, 115}, {2, 4}} {
		report, found, err := db.TrainBatch(ctx, limits, training.Learn)
		must(t, err)
		if !found || report.Episodes != want.episodes || report.Result.Steps != want.steps {
			t.Fatalf("batch %d: found %v, %d episodes, %d steps; want %d episodes, %d steps",
				i+1, found, report.Episodes, report.Result.Steps, want.episodes, want.steps)
		}
	}
	if _, found, err := db.TrainBatch(ctx, limits, training.Learn); err != nil || found {
		t.Fatalf("after the backlog: found %v, %v", found, err)
	}
}
