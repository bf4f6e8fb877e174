package storage

import (
	"fmt"
	"runtime"
	"testing"

	"github.com/qtally/qtally/training"
)

// BenchmarkWarmTable measures what the worker's warm estimates cost: the
// live heap per pair of a table of 250,000 states x 4 actions, built as
// batches build it (the states read, then the pairs written), and the time
// to give a 2,000-state batch its estimates from it.
func BenchmarkWarmTable(b *testing.B) {
	const states, actions = 250_000, 4
	names := make([]string, states)
	for i := range names {
		names[i] = fmt.Sprintf("tier=%d|day=%d|reason=%d", i%7, (i/7)%30, i/210)
	}
	build := func() *warmTable {
		t := &warmTable{states: map[string][]warmEstimate{}}
		t.learn(names, nil, actions)
		pairs := make([]training.PairResult, 0, states*actions)
		for _, s := range names {
			for a := range actions {
				pairs = append(pairs, training.PairResult{PairKey: training.PairKey{State: s, Action: int16(a)}, Estimate: training.Estimate{Q: 1, Visits: 1}})
			}
		}
		t.apply(pairs)
		return t
	}
	var before, after runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&before)
	t := build()
	runtime.GC()
	runtime.ReadMemStats(&after)
	perPair := float64(after.HeapAlloc-before.HeapAlloc) / float64(t.pairs)
	batch := names[:2000]
	b.ResetTimer()
	for range b.N {
		if len(t.current(batch)) != len(batch)*actions {
			b.Fatal("missing estimates")
		}
	}
	// Reported after the loop: ResetTimer drops metrics reported before it.
	b.ReportMetric(perPair, "heap-bytes/pair")
	runtime.KeepAlive(t)
}
