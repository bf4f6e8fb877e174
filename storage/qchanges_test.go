package storage_test

import (
	"context"
	"fmt"
	"maps"
	"slices"
	"testing"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

// API processes read only what batches after their revision changed; when
// the record of changes no longer reaches back that far, they get the
// whole table instead.
func TestRowsSinceFollowsTheRecordOfChanges(t *testing.T) {
	ctx := context.Background()
	url := pgtest.NewDatabase(t)
	db, err := storage.Open(ctx, url, 4, training.DefaultLimits())
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	p, _, err := db.PutPolicy(ctx, "reminders", training.Settings{Actions: []string{"now", "later"}, Gamma: 1, Alpha: 0.5, Visit: training.EveryVisit})
	if err != nil {
		t.Fatal(err)
	}
	trainOne := func(id, state, action string) {
		t.Helper()
		eps := []training.Episode{{ID: id, Steps: []training.Step{{State: state, Action: action, Reward: 1}}}}
		if _, ingestErr := db.Ingest(ctx, "reminders", eps); ingestErr != nil {
			t.Fatal(ingestErr)
		}
		if _, trained, trainErr := db.TrainBatch(ctx, training.BatchLimits{Episodes: 10}, training.Learn); trainErr != nil || !trained {
			t.Fatalf("train %s: trained=%v %v", id, trained, trainErr)
		}
	}
	keys := func(after int64) []string {
		t.Helper()
		var out []string
		if listErr := db.QRowsSince(ctx, p.ID, after, func(r training.QRow) {
			out = append(out, r.State+"/"+p.Actions[r.Action])
		}); listErr != nil {
			t.Fatal(listErr)
		}
		slices.Sort(out)
		return out
	}
	trainOne("1", "a", "now")   // revision 1
	trainOne("2", "b", "later") // revision 2
	trainOne("3", "a", "now")   // revision 3
	if got := keys(0); !slices.Equal(got, []string{"a/now", "b/later"}) {
		t.Fatalf("whole table: %v", got)
	}
	if got := keys(1); !slices.Equal(got, []string{"a/now", "b/later"}) {
		t.Fatalf("after revision 1: %v", got)
	}
	if got := keys(2); !slices.Equal(got, []string{"a/now"}) {
		t.Fatalf("after revision 2: %v, want only the pair revision 3 changed", got)
	}
	if got := keys(3); len(got) != 0 {
		t.Fatalf("after the latest revision: %v, want nothing", got)
	}
	// Forget the record of revision 2, as pruning does for copies far
	// behind: a copy at revision 1 must now be given everything.
	conn, err := pgx.Connect(ctx, url)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	if _, err := conn.Exec(ctx, `DELETE FROM q_changes WHERE revision = 2`); err != nil {
		t.Fatal(err)
	}
	if got := keys(2); !slices.Equal(got, []string{"a/now"}) {
		t.Fatalf("after revision 2, with its own record gone: %v", got)
	}
	trainOne("4", "c", "later") // revision 4
	if got := keys(1); !slices.Equal(got, []string{"a/now", "b/later", "c/later"}) {
		t.Fatalf("after revision 1 with a gap in the record: %v, want the whole table", got)
	}
}

// A copy at any revision that applies, in the order given, the rows read
// since that revision ends equal to the table: read from the change
// records when it is a few revisions behind (a pair changed by several of
// them must end at its latest value), through q_values further behind or
// when a record carries no values (written before records carried them).
func TestRowsSinceBringACopyToTheTable(t *testing.T) {
	ctx := context.Background()
	db, conn := openWithConn(t)
	p, _, err := db.PutPolicy(ctx, "reminders", training.Settings{Actions: []string{"now", "later"}, Gamma: 1, Alpha: 0.5, Visit: training.EveryVisit})
	must(t, err)
	type pair struct {
		state  string
		action int16
	}
	type value struct {
		q        float64
		visits   int64
		revision int64
	}
	read := func(after int64, into map[pair]value) {
		t.Helper()
		must(t, db.QRowsSince(ctx, p.ID, after, func(r training.QRow) {
			into[pair{r.State, r.Action}] = value{r.Q, r.Visits, r.Revision}
		}))
	}
	var copies []map[pair]value // the table after each revision
	for i := range 8 {
		eps := []training.Episode{{ID: fmt.Sprint(i), Steps: []training.Step{
			{State: "overdue", Action: "now", Reward: float64(i)},
			{State: fmt.Sprint("day ", i%3), Action: "later", Reward: float64(10 * i)}}}}
		_, err := db.Ingest(ctx, "reminders", eps)
		must(t, err)
		_, trained, err := db.TrainBatch(ctx, training.BatchLimits{Episodes: 10}, training.Learn)
		must(t, err)
		if !trained {
			t.Fatalf("batch %d trained nothing", i)
		}
		table := map[pair]value{}
		read(0, table)
		copies = append(copies, table)
	}
	check := func(when string) {
		t.Helper()
		latest := copies[len(copies)-1]
		for k := range len(copies) - 1 {
			copied := maps.Clone(copies[k])
			read(int64(k+1), copied)
			for key, want := range latest {
				if got := copied[key]; got.q != want.q || got.visits != want.visits {
					t.Errorf("%s: a copy at revision %d ends with %v at %+v, the table has %+v", when, k+1, key, got, want)
				}
			}
		}
	}
	check("records with values")
	if _, err := conn.Exec(ctx, `UPDATE q_changes SET q = NULL, visits = NULL WHERE revision = 7`); err != nil {
		t.Fatal(err)
	}
	check("a record without values")
}
