package training

import (
	"context"
	"fmt"
	"math/rand/v2"
	"runtime"
	"testing"
	"time"
)

// Benchmarks of the hot pure parts. Figures are per core and are compared
// with the machine's ceilings by make bench (BENCHMARKS.md); CI runs each
// once (-benchtime=1x) so that they keep compiling and running.

// benchShape is the batch the brief's figures use: 2000 episodes of 20
// steps over 25,000 states x 4 actions (100k pairs).
const (
	benchEpisodes = 2000
	benchSteps    = 20
	benchStates   = 25_000
	benchActions  = 4
)

func benchStateName(i int) string {
	return fmt.Sprintf("tier=%d|day=%d|reason=%d", i%7, (i/7)%30, i/210)
}

func benchPolicy() Policy {
	s := DefaultSettings()
	s.Actions = []string{"retry_card", "wait", "email_reminder", "text_reminder"}
	s.Gamma, s.Alpha = 0.99, 0.05
	return Policy{ID: 1, Name: "bench", Settings: s, Revision: 1}
}

// benchBatch is a stored batch and the estimates of every pair of every
// state it touches, as storage reads them when the table is full.
func benchBatch() BatchInput {
	rng := rand.New(rand.NewPCG(1, 2))
	names := make([]string, benchStates)
	for i := range names {
		names[i] = benchStateName(i)
	}
	episodes := make([]StoredEpisode, benchEpisodes)
	for i := range episodes {
		ep := StoredEpisode{Seq: int64(i + 1), EpisodeRecord: EpisodeRecord{ID: fmt.Sprintf("ep-%d", i),
			States: make([]string, benchSteps), Actions: make([]int16, benchSteps), Rewards: make([]float64, benchSteps)}}
		for t := range benchSteps {
			ep.States[t] = names[rng.IntN(benchStates)]
			ep.Actions[t] = int16(rng.IntN(benchActions))
			ep.Rewards[t] = float64(rng.IntN(200)-50) / 10
		}
		episodes[i] = ep
	}
	current := map[PairKey]Estimate{}
	for _, s := range TouchedStates(episodes) {
		for a := range benchActions {
			current[PairKey{s, int16(a)}] = Estimate{Q: rng.NormFloat64(), Visits: int64(1 + rng.IntN(50))}
		}
	}
	return BatchInput{Policy: benchPolicy(), Episodes: episodes, Current: current}
}

// BenchmarkLearn is the worker's compute for one batch: returns, constant
// steps replayed in order, greedy-change count.
func BenchmarkLearn(b *testing.B) {
	for _, visit := range []VisitRule{FirstVisit, EveryVisit} {
		b.Run(string(visit), func(b *testing.B) {
			in := benchBatch()
			in.Policy.Visit = visit
			b.ReportAllocs()
			b.ResetTimer()
			for b.Loop() {
				Learn(in)
			}
			reportSteps(b, benchEpisodes*benchSteps)
		})
	}
}

// BenchmarkTouchedStates is the list of states storage reads estimates for.
func BenchmarkTouchedStates(b *testing.B) {
	in := benchBatch()
	b.ReportAllocs()
	for b.Loop() {
		TouchedStates(in.Episodes)
	}
	reportSteps(b, benchEpisodes*benchSteps)
}

func reportSteps(b *testing.B, perOp int) {
	b.ReportMetric(float64(perOp)*float64(b.N)/b.Elapsed().Seconds(), "steps/s")
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(perOp)/float64(b.N), "ns/step")
}

// BenchmarkChoose is the epsilon-soft rule on 4 values.
func BenchmarkChoose(b *testing.B) {
	q := []float64{0.3, 1.2, -0.4, 1.1}
	b.Run("explore/own-rand", func(b *testing.B) {
		rng := rand.New(rand.NewPCG(1, 2))
		b.ReportAllocs()
		for b.Loop() {
			Choose(q, Explore, 0.1, rng)
		}
	})
	b.Run("explore/shared-rand", func(b *testing.B) {
		b.ReportAllocs()
		for b.Loop() {
			Choose(q, Explore, 0.1, SharedRandom)
		}
	})
	b.Run("greedy/shared-rand", func(b *testing.B) {
		b.ReportAllocs()
		for b.Loop() {
			Choose(q, Greedy, 0.1, SharedRandom)
		}
	})
}

// benchRows are n stored pairs: n/4 states x 4 actions, as QRowsSince
// delivers them.
func benchRows(n int) []QRow {
	rng := rand.New(rand.NewPCG(3, 4))
	rows := make([]QRow, n)
	for i := range rows {
		rows[i] = QRow{State: benchStateName(i / benchActions), Action: int16(i % benchActions),
			Q: rng.NormFloat64(), Visits: int64(1 + rng.IntN(50)), Revision: 1}
	}
	return rows
}

// loadedTable is a policy's table filled with rows, as a first load does.
func loadedTable(p Policy, rows []QRow) *replicaTable {
	t := &replicaTable{pairsByVisits: map[int64]int64{}}
	t.setPolicy(p)
	for _, row := range rows {
		t.applyRow(row)
	}
	return t
}

// benchReplica holds one policy's table filled with rows, without a source:
// choosing never reads one once the table is loaded.
func benchReplica(rows []QRow) *Replica {
	p := benchPolicy()
	t := loadedTable(p, rows)
	t.syncedAt.Store(time.Now().UnixNano())
	return &Replica{byName: map[string]*replicaTable{p.Name: t}, byID: map[int32]*replicaTable{p.ID: t}}
}

// BenchmarkReplicaChoose is choose as the API answers it: a populated
// table of 100k pairs, known states, all actions allowed, serially and from
// every core at once (the table's read lock is shared).
func BenchmarkReplicaChoose(b *testing.B) {
	r := benchReplica(benchRows(benchStates * benchActions))
	states := make([]string, 4096)
	for i := range states {
		states[i] = benchStateName(i * 6 % benchStates)
	}
	ctx := context.Background()
	b.Run("serial", func(b *testing.B) {
		b.ReportAllocs()
		i := 0
		for b.Loop() {
			if _, err := r.Choose(ctx, "bench", ChooseRequest{State: states[i%len(states)], Mode: Explore}); err != nil {
				b.Fatal(err)
			}
			i++
		}
	})
	b.Run("allowed", func(b *testing.B) {
		allowed := []string{"wait", "text_reminder", "retry_card"}
		b.ReportAllocs()
		i := 0
		for b.Loop() {
			if _, err := r.Choose(ctx, "bench", ChooseRequest{State: states[i%len(states)], Mode: Explore, Allowed: allowed}); err != nil {
				b.Fatal(err)
			}
			i++
		}
	})
	b.Run("parallel", func(b *testing.B) {
		b.ReportAllocs()
		b.RunParallel(func(pb *testing.PB) {
			i := rand.IntN(len(states))
			for pb.Next() {
				if _, err := r.Choose(ctx, "bench", ChooseRequest{State: states[i%len(states)], Mode: Explore}); err != nil {
					b.Error(err)
					return
				}
				i++
			}
		})
	})
}

// BenchmarkReplicaApply loads 1M stored pairs (250k states x 4 actions)
// into an empty table, as the first choose of a policy does, and reports
// what the table keeps in memory per pair: the Go heap still in use after
// a collection, with the table live and the rows dropped (as sync drops
// them), state names included.
func BenchmarkReplicaApply(b *testing.B) {
	const pairs = 1_000_000
	p := benchPolicy()
	var perPair float64
	b.ReportAllocs()
	for b.Loop() {
		b.StopTimer()
		before := heapInUse()
		// Fresh strings each time, as the database driver decodes them.
		rows := benchRows(pairs)
		b.StartTimer()
		t := loadedTable(p, rows)
		b.StopTimer()
		perPair = float64(heapInUse()-before) / pairs
		runtime.KeepAlive(t)
		b.StartTimer()
	}
	b.ReportMetric(float64(pairs)*float64(b.N)/b.Elapsed().Seconds(), "rows/s")
	b.ReportMetric(perPair, "heap-bytes/pair")
}

func heapInUse() uint64 {
	runtime.GC()
	var m runtime.MemStats
	runtime.ReadMemStats(&m)
	return m.HeapAlloc
}
