package training_test

import (
	"testing"
	"time"

	"github.com/qtally/qtally/training"
)

// Batches stay near the target time while training keeps up, double while
// they come back full (the policy is behind), and return to the small size
// with the first batch that is not full; each policy has its own history.
func TestBatchSizerKeepsUpSmallAndCatchesUpLarge(t *testing.T) {
	s := &training.BatchSizer{Target: 300 * time.Millisecond, Min: 50}
	const most = 10_000
	if got := s.Limit(1, most); got != most {
		t.Fatalf("a policy with no batch yet gets %d, want the maximum %d", got, most)
	}
	// 200 episodes waiting, taken whole in 200 ms: 1 ms an episode, so 300
	// fit in the target.
	s.Observe(1, 200, false, 200*time.Millisecond)
	if got := s.Limit(1, most); got != 300 {
		t.Fatalf("keeping up at 1 ms an episode: limit %d, want 300", got)
	}
	// Full batches: behind, so the limit doubles up to the maximum.
	want := []int{600, 1200, 2400, 4800, 9600, most, most}
	for i, w := range want {
		limit := s.Limit(1, most)
		s.Observe(1, limit, true, time.Duration(limit)*time.Millisecond)
		if got := s.Limit(1, most); got != w {
			t.Fatalf("after full batch %d: limit %d, want %d", i+1, got, w)
		}
	}
	// A batch its step bound cut short is full too: still behind.
	s.Observe(1, 3000, true, 3*time.Second)
	if got := s.Limit(1, most); got != most {
		t.Fatalf("after a batch cut by its steps: limit %d, want %d", got, most)
	}
	// Caught up: back to what fits in the target.
	s.Observe(1, 30, false, 30*time.Millisecond)
	if got := s.Limit(1, most); got != 300 {
		t.Fatalf("caught up at 1 ms an episode: limit %d, want 300", got)
	}
	// Another policy is unaffected; a slow one is held at the minimum.
	if got := s.Limit(2, most); got != most {
		t.Fatalf("policy 2 with no batch yet: limit %d", got)
	}
	s.Observe(2, 10, false, 10*time.Second)
	if got := s.Limit(2, most); got != 50 {
		t.Fatalf("a policy at 1 s an episode: limit %d, want the minimum 50", got)
	}
	if got := s.Limit(1, 100); got != 100 {
		t.Fatalf("a smaller maximum: limit %d, want 100", got)
	}
}

// A batch is full when it reached either bound; a zero step bound is none.
func TestBatchLimitsFull(t *testing.T) {
	limits := training.BatchLimits{Episodes: 100, Steps: 2000}
	for _, c := range []struct {
		episodes, steps int
		full            bool
	}{
		{99, 1999, false}, {100, 10, true}, {40, 2000, true}, {1, 5000, true},
	} {
		if got := limits.Full(c.episodes, c.steps); got != c.full {
			t.Errorf("%d episodes, %d steps: full %v, want %v", c.episodes, c.steps, got, c.full)
		}
	}
	if (training.BatchLimits{Episodes: 100}).Full(99, 1<<40) {
		t.Error("with no step bound, steps alone made a batch full")
	}
}

// A batch that did not commit is taken again at half of what it read (of
// its limit when it read nothing), never below the minimum.
func TestBatchSizerHalvesAfterAFailedBatch(t *testing.T) {
	s := &training.BatchSizer{Target: 300 * time.Millisecond, Min: 50}
	for _, c := range []struct{ read, limit, want int }{{8000, 10_000, 4000}, {0, 3000, 1500}, {60, 10_000, 50}} {
		s.Failed(1, c.read, c.limit)
		if got := s.Limit(1, 10_000); got != c.want {
			t.Errorf("after a failed batch that read %d of %d: limit %d, want %d", c.read, c.limit, got, c.want)
		}
	}
}
