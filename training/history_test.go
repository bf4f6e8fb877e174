package training

import (
	"testing"
)

func TestSummarizeBatchCountsReturnsUpdatesAndNewEstimates(t *testing.T) {
	p := Policy{Settings: Settings{Actions: []string{"hold", "ship", "drop"}, Gamma: 0.5, Alpha: 0.5, Visit: EveryVisit}}
	// "late" has one stored pair; "early" and "lost" have none.
	current := map[PairKey]Estimate{{"late", 0}: {Q: 4, Visits: 3, LastDelta: 1}}
	eps := []StoredEpisode{
		{EpisodeRecord: EpisodeRecord{States: []string{"late", "early"}, Actions: []int16{1, 0}, Rewards: []float64{2, 4}}},
		{EpisodeRecord: EpisodeRecord{States: []string{"late", "lost", "lost"}, Actions: []int16{0, 2, 2}, Rewards: []float64{-1, 0, 8}}},
	}
	in := BatchInput{Policy: p, Episodes: eps, Current: current}
	res := Learn(in)
	s := SummarizeBatch(in, res)
	// G0 worked by hand: 2 + 0.5*4 = 4, and -1 + 0.5*(0 + 0.5*8) = 1.
	if s.Episodes != 2 || s.Steps != 5 || s.Updates != 5 || s.SumReturn != 5 {
		t.Fatalf("summary %+v; want 2 episodes, 5 steps, 5 updates, returns summing to 5", s)
	}
	sum := 0.0
	for _, d := range res.AbsDeltas {
		sum += d
	}
	if s.SumAbsDelta != sum || s.GreedyChanges != res.GreedyChanges {
		t.Fatalf("summary %+v; want |delta| sum %v and %d greedy changes", s, sum, res.GreedyChanges)
	}
	// New: pairs (late, ship), (early, hold), (lost, drop); states early, lost.
	if s.NewPairs != 3 || s.NewStates != 2 {
		t.Fatalf("new pairs %d, new states %d; want 3 and 2", s.NewPairs, s.NewStates)
	}
}
