package storage_test

import (
	"context"
	"fmt"
	"testing"

	"github.com/qtally/qtally/training"
)

// BenchmarkIngest stores batches of 1,000 ten-step episodes: over states
// the policy knows (the common case, where recording states costs one index
// probe per distinct state of the batch), and with every state new (where
// the policy's states are counted too).
func BenchmarkIngest(b *testing.B) {
	ctx := context.Background()
	for _, c := range []struct {
		name     string
		distinct func(batch, episode, step int) string
	}{
		{"known-states", func(_, e, k int) string { return fmt.Sprintf("s%d", (e+k)%50) }},
		{"new-states", func(batch, e, k int) string { return fmt.Sprintf("b%d-e%d-s%d", batch, e, k) }},
	} {
		b.Run(c.name, func(b *testing.B) {
			db := openDB(b)
			s := training.Settings{Actions: []string{"a", "b"}, Gamma: 1, Alpha: 0.1, Visit: training.FirstVisit, MaxStates: 500_000}
			if _, _, err := db.PutPolicy(ctx, "bench", s); err != nil {
				b.Fatal(err)
			}
			batch := func(n int) []training.Episode {
				eps := make([]training.Episode, 1000)
				for e := range eps {
					eps[e].ID = fmt.Sprintf("%d-%d", n, e)
					for k := range 10 {
						eps[e].Steps = append(eps[e].Steps, training.Step{State: c.distinct(n, e, k), Action: "a", Reward: 1})
					}
				}
				return eps
			}
			b.ResetTimer()
			for i := range b.N {
				b.StopTimer()
				eps := batch(i)
				b.StartTimer()
				if _, err := db.Ingest(ctx, "bench", eps); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*1000), "ns/episode")
		})
	}
}
