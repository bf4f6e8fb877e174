package training

import (
	"math"
	"testing"
	"time"
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

func TestGreedyGapIsTheLeadOverTheRunnerUp(t *testing.T) {
	p := Policy{Settings: Settings{Actions: []string{"a", "b", "c"}, InitialQ: 0.5}}
	at := time.Now()
	for _, c := range []struct {
		stored map[int16]ActionValue
		greedy string
		gap    float64
	}{
		{map[int16]ActionValue{0: {Q: 1, Visits: 1}, 1: {Q: 3, Visits: 1}, 2: {Q: 2, Visits: 1}}, "b", 1},
		{map[int16]ActionValue{0: {Q: 3, Visits: 1}, 1: {Q: 3, Visits: 1}, 2: {Q: 1, Visits: 1}}, "a", 0},
		// Actions never tried count at the initial value in the gap, but are
		// never greedy unless the policy says so, as choosing does.
		{map[int16]ActionValue{2: {Q: 2, Visits: 1}}, "c", 1.5},
		{map[int16]ActionValue{1: {Q: -1, Visits: 1}}, "b", 0},
	} {
		s := NewStateSummary(p, "s", c.stored, 0, at)
		if s.GreedyAction != c.greedy || math.Abs(s.GreedyGap-c.gap) > 1e-15 {
			t.Fatalf("%v: greedy %s gap %v; want %s and %v", c.stored, s.GreedyAction, s.GreedyGap, c.greedy, c.gap)
		}
	}
}

func TestHistoryStepKeepsPointsBoundedAndBucketsWhole(t *testing.T) {
	for _, c := range []struct {
		window, bucket time.Duration
		want           time.Duration
	}{
		{6 * time.Hour, time.Minute, 2 * time.Minute},
		{48 * time.Hour, time.Minute, 16 * time.Minute},
		{time.Hour, time.Minute, time.Minute},
		{2 * time.Minute, time.Second, time.Second},
		{5 * time.Minute, time.Second, 2 * time.Second},
	} {
		got := HistoryStep(c.window, c.bucket, 180)
		if got != c.want || got%c.bucket != 0 || c.window/got > 180 {
			t.Fatalf("step for %v of %v buckets = %v, want %v", c.window, c.bucket, got, c.want)
		}
	}
}
