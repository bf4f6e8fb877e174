package training

import (
	"time"
)

// BatchSummary is what one committed batch adds to its policy's training
// history.
type BatchSummary struct {
	Episodes      int
	Steps         int
	SumReturn     float64
	SumAbsDelta   float64
	Updates       int
	GreedyChanges int
	// NewStates and NewPairs count states and pairs that had no estimate
	// before the batch.
	NewStates int
	NewPairs  int
}

// SummarizeBatch condenses a batch and its result for the history.
func SummarizeBatch(in BatchInput, res BatchResult) BatchSummary {
	s := BatchSummary{Episodes: len(in.Episodes), Steps: res.Steps, Updates: len(res.AbsDeltas), GreedyChanges: res.GreedyChanges}
	for _, g := range res.EpisodeReturns {
		s.SumReturn += g
	}
	for _, d := range res.AbsDeltas {
		s.SumAbsDelta += d
	}
	// Current holds every stored pair of every state the batch touches, so
	// a state is new exactly when none of its pairs is there.
	known := make(map[string]bool, len(in.Current))
	for k := range in.Current {
		known[k.State] = true
	}
	counted := make(map[string]bool)
	for _, p := range res.Pairs {
		if _, ok := in.Current[p.PairKey]; !ok {
			s.NewPairs++
		}
		if !known[p.State] && !counted[p.State] {
			counted[p.State] = true
			s.NewStates++
		}
	}
	return s
}

// HistoryPoint is what training did in one stretch of time.
type HistoryPoint struct {
	Start         time.Time
	Batches       int64
	Episodes      int64
	Steps         int64
	SumReturn     float64
	SumAbsDelta   float64
	Updates       int64
	GreedyChanges int64
	// Backlog is the untrained episode count sampled in the stretch: after
	// the first batch of its latest stored bucket.
	Backlog int64
	// States and Pairs are how many had estimates at the end of the stretch.
	States int64
	Pairs  int64
}

// MeanReturn is the mean discounted return G0 of the episodes trained.
func (p HistoryPoint) MeanReturn() float64 {
	if p.Episodes == 0 {
		return 0
	}
	return p.SumReturn / float64(p.Episodes)
}

// MeanDrift is the mean size |delta Q| of the updates applied: large while
// estimates still move, small once they settle.
func (p HistoryPoint) MeanDrift() float64 {
	if p.Updates == 0 {
		return 0
	}
	return p.SumAbsDelta / float64(p.Updates)
}

// HistoryStep is the stretch of time one point of a window covers: a whole
// number of stored buckets, so that no bucket is split, and at most
// maxPoints points over the window.
func HistoryStep(window, bucket time.Duration, maxPoints int) time.Duration {
	n := (window + bucket*time.Duration(maxPoints) - 1) / (bucket * time.Duration(maxPoints))
	return bucket * max(n, 1)
}

// PolicyReport is what the status page shows of one policy.
type PolicyReport struct {
	Status  PolicyStatus
	Window  time.Duration
	Step    time.Duration
	History []HistoryPoint
	// MostDrift and MostVisited are the states whose latest update moved
	// an estimate most, and the states visited most.
	MostDrift   []StateSummary
	MostVisited []StateSummary
}
