package storage_test

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"testing"

	"github.com/qtally/qtally/training"
)

// Batches racing for a policy's last room count each other's states: with
// room for 100, ten batches of 20 new states each get five in, five out,
// and the policy ends with exactly 100 states.
func TestConcurrentBatchesShareTheStateQuota(t *testing.T) {
	ctx := context.Background()
	db := openDB(t)
	s := training.Settings{Actions: []string{"a", "b"}, Gamma: 1, Alpha: 0.1, Visit: training.FirstVisit, MaxStates: 100}
	if _, _, err := db.PutPolicy(ctx, "racing", s); err != nil {
		t.Fatal(err)
	}
	var wg sync.WaitGroup
	results := make([]error, 10)
	for b := range results {
		wg.Add(1)
		go func() {
			defer wg.Done()
			var steps []training.Step
			for k := range 20 {
				steps = append(steps, training.Step{State: fmt.Sprintf("b%d-s%d", b, k), Action: "a"})
			}
			_, results[b] = db.Ingest(ctx, "racing", []training.Episode{{ID: fmt.Sprint(b), Steps: steps}})
		}()
	}
	wg.Wait()
	var in, out int
	for _, err := range results {
		switch {
		case err == nil:
			in++
		case errors.Is(err, training.ErrQuota):
			out++
		default:
			t.Fatal(err)
		}
	}
	st, err := db.PolicyStatus(ctx, "racing")
	if err != nil {
		t.Fatal(err)
	}
	if in != 5 || out != 5 || st.Episodes != 5 {
		t.Fatalf("%d batches in, %d refused, %d episodes stored; want 5, 5, 5", in, out, st.Episodes)
	}
}
