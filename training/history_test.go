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

func sampleOf(n int64) *int64 { return &n }

// A policy younger than the window fills the timeline from its first
// training; points are whole numbers of the widest bucket in range, so a
// coarse row is never split and the sums survive binning; coverage at each
// point is today's count less what later buckets added.
func TestReportBinsFineAndCoarseRowsWhole(t *testing.T) {
	now := time.Date(2030, 5, 1, 12, 0, 0, 0, time.UTC)
	var buckets []HistoryBucket
	// Two coarse minutes 90 and 89 minutes ago, then 60 fine seconds.
	for _, m := range []int{90, 89} {
		buckets = append(buckets, HistoryBucket{Start: now.Add(-time.Duration(m) * time.Minute), Width: time.Minute,
			Batches: 10, Episodes: 100, SumReturn: 50, NewStates: 2, NewPairs: 3, Backlog: sampleOf(7)})
	}
	for s := 60; s > 0; s-- {
		buckets = append(buckets, HistoryBucket{Start: now.Add(-time.Duration(s) * time.Second), Width: time.Second,
			Batches: 1, Episodes: 10, SumReturn: float64(s), NewStates: 1, NewPairs: 1})
	}
	r := PolicyReport{Status: PolicyStatus{States: 1000, Pairs: 2000}, Now: now, Window: 6 * time.Hour, Buckets: buckets}

	line := r.Timeline(180)
	if !line.From.Equal(now.Add(-90*time.Minute)) || line.Step%time.Minute != 0 || line.To != now {
		t.Fatalf("timeline from %v in steps of %v to %v; want from the first training, in whole minutes, to now", line.From, line.Step, line.To)
	}
	var episodes int64
	for _, p := range line.Points {
		episodes += p.Episodes
		if p.Start.Sub(time.Unix(0, 0))%line.Step != 0 {
			t.Fatalf("point at %v is not aligned to %v", p.Start, line.Step)
		}
	}
	if episodes != 800 {
		t.Fatalf("the timeline holds %d episodes, want all 800 stored", episodes)
	}
	if last := line.Points[len(line.Points)-1]; last.States != 1000 || last.Pairs != 2000 {
		t.Fatalf("coverage ends at %d states, %d pairs; want today's 1000, 2000", last.States, last.Pairs)
	}
	if first := line.Points[0]; first.States != 1000-60-2 || *first.Backlog != 7 {
		t.Fatalf("first point: %d states (want 938: today's less what the 61 later buckets added), backlog %v", first.States, first.Backlog)
	}

	// Only the fine minute in range: one point per second.
	r.Buckets = buckets[2:]
	line = r.Timeline(180)
	if line.Step != time.Second || len(line.Points) != 60 || !line.From.Equal(now.Add(-time.Minute)) {
		t.Fatalf("a one-minute life: %d points of %v from %v; want 60 of 1s from %v", len(line.Points), line.Step, line.From, now.Add(-time.Minute))
	}
	if line.Points[0].Backlog != nil {
		t.Fatalf("a point without a backlog sample reads %d", *line.Points[0].Backlog)
	}

	// Long after training stopped, the timeline thins out but the learning
	// curve still spans the training only.
	r.Now = now.Add(5 * time.Hour)
	if line := r.Timeline(180); len(line.Points) >= 30 {
		t.Fatalf("five idle hours later the timeline still has %d points", len(line.Points))
	}
	progress := r.Progress(180)
	if progress.Step != time.Second || len(progress.Points) != 60 {
		t.Fatalf("the learning curve has %d points of %v, want 60 of 1s", len(progress.Points), progress.Step)
	}
}
