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

// BacklogSampleEvery is how often the training history samples a policy's
// backlog at most: counting costs time in proportion to the backlog, and a
// policy that is behind should not pay that every second.
const BacklogSampleEvery = 5 * time.Second

// HistoryBucket is one stored row of training history: what training did
// from Start for Width.
type HistoryBucket struct {
	Start         time.Time
	Width         time.Duration
	Batches       int64
	Episodes      int64
	Steps         int64
	SumReturn     float64
	SumAbsDelta   float64
	Updates       int64
	GreedyChanges int64
	// NewStates and NewPairs got their first estimate in the bucket.
	NewStates int64
	NewPairs  int64
	// Backlog is the untrained episode count after a batch of the bucket,
	// nil when the bucket holds no sample.
	Backlog *int64
}
