package views

import (
	"testing"
	"time"

	"github.com/qtally/qtally/training"
)

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
	var buckets []training.HistoryBucket
	// Two coarse minutes 90 and 89 minutes ago, then 60 fine seconds.
	for _, m := range []int{90, 89} {
		buckets = append(buckets, training.HistoryBucket{Start: now.Add(-time.Duration(m) * time.Minute), Width: time.Minute,
			Batches: 10, Episodes: 100, SumReturn: 50, NewStates: 2, NewPairs: 3, Backlog: sampleOf(7)})
	}
	for s := 60; s > 0; s-- {
		buckets = append(buckets, training.HistoryBucket{Start: now.Add(-time.Duration(s) * time.Second), Width: time.Second,
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
