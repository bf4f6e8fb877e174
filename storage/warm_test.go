package storage_test

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

// sequentialQ applies every-visit constant-step Monte Carlo updates one at a
// time, episode after episode, each from its last step back to its first:
// G_t = r_t + gamma G_{t+1}, Q(s_t, a_t) <- Q(s_t, a_t) + alpha (G_t - Q(s_t, a_t))
// (Sutton & Barto, Reinforcement Learning: An Introduction, 2nd ed.,
// eq. 6.1, the constant-alpha Monte Carlo update, applied to action values
// as in section 5.3). Pairs start at 0.
func sequentialQ(table map[string]training.TableRow, eps []training.Episode, gamma, alpha float64) {
	for _, ep := range eps {
		g := 0.0
		for t := len(ep.Steps) - 1; t >= 0; t-- {
			st := ep.Steps[t]
			g = st.Reward + gamma*g
			k := st.State + "/" + st.Action
			row := table[k]
			row.State, row.Action = st.State, st.Action
			row.Q += alpha * (g - row.Q)
			row.Visits++
			table[k] = row
		}
	}
}

// Two workers (two stores, as two processes would have) train one policy
// in an interleaving where each often trains several batches in a row and
// so keeps its estimates warm, and where an import replaces the table in
// between: the table must equal the sequential computation throughout.
// A worker that trusted its warm estimates after the other worker, or the
// import, had written would start from stale values and miss it.
func TestWarmEstimatesFollowOtherWriters(t *testing.T) {
	ctx := context.Background()
	url := pgtest.NewDatabase(t)
	var workers []*storage.DB
	for range 2 {
		db, err := storage.Open(ctx, url, 4, training.DefaultLimits())
		if err != nil {
			t.Fatal(err)
		}
		defer db.Close()
		workers = append(workers, db)
	}
	const gamma, alpha = 0.9, 0.3
	actions := []string{"call", "mail", "wait"}
	settings := training.Settings{Actions: actions, Gamma: gamma, Alpha: alpha, Visit: training.EveryVisit}
	if _, _, err := workers[0].PutPolicy(ctx, "renewals", settings); err != nil {
		t.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(3, 5))
	episodes := func(prefix string, n int) []training.Episode {
		eps := make([]training.Episode, n)
		for i := range eps {
			steps := make([]training.Step, 1+rng.IntN(6))
			for j := range steps {
				steps[j] = training.Step{State: fmt.Sprintf("month %d", rng.IntN(5)), Action: actions[rng.IntN(len(actions))],
					Reward: float64(rng.IntN(11) - 3)}
			}
			eps[i] = training.Episode{ID: fmt.Sprintf("%s-%d", prefix, i), Steps: steps}
		}
		return eps
	}
	reference := map[string]training.TableRow{}
	trainInterleaved := func(eps []training.Episode) {
		t.Helper()
		for len(eps) > 0 {
			n := min(len(eps), 1+rng.IntN(15))
			if _, err := workers[0].Ingest(ctx, "renewals", eps[:n]); err != nil {
				t.Fatal(err)
			}
			sequentialQ(reference, eps[:n], gamma, alpha)
			eps = eps[n:]
			for {
				// Runs of one worker: the same one again two times in three.
				w := workers[rng.IntN(2)]
				if _, trained, err := w.TrainBatch(ctx, training.BatchLimits{Episodes: 1 + rng.IntN(4)}, training.Learn); err != nil {
					t.Fatal(err)
				} else if !trained {
					break
				}
				for rng.IntN(3) > 0 {
					if _, trained, err := w.TrainBatch(ctx, training.BatchLimits{Episodes: 1 + rng.IntN(4)}, training.Learn); err != nil || !trained {
						break
					}
				}
			}
		}
		compareWithReference(t, workers[1], "renewals", reference)
	}

	trainInterleaved(episodes("a", 150))
	// An import replaces the table (and bumps the epoch); later training
	// starts from the imported values.
	var rows []training.TableRow
	for k, r := range reference {
		r.Q = -r.Q + 1
		reference[k] = r
		rows = append(rows, r)
	}
	if _, err := workers[1].ImportTable(ctx, "renewals", rows, nil); err != nil {
		t.Fatal(err)
	}
	trainInterleaved(episodes("b", 150))
}

func compareWithReference(t *testing.T, db *storage.DB, policy string, want map[string]training.TableRow) {
	t.Helper()
	table, err := db.ExportTable(context.Background(), policy, training.LiveTable)
	if err != nil {
		t.Fatal(err)
	}
	if len(table.Rows) != len(want) {
		t.Fatalf("the table has %d pairs, the sequential computation %d", len(table.Rows), len(want))
	}
	for _, got := range table.Rows {
		w := want[got.State+"/"+got.Action]
		if math.Abs(got.Q-w.Q) > 1e-9 || got.Visits != w.Visits {
			t.Fatalf("%s/%s: stored Q=%v N=%d, sequential Q=%v N=%d", got.State, got.Action, got.Q, got.Visits, w.Q, w.Visits)
		}
	}
}
