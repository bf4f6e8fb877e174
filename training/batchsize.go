package training

import (
	"sync"
	"time"
)

// BatchSizer chooses how many episodes a policy's next training batch may
// take. A batch takes what is waiting up to that limit, so the limit only
// matters when more is waiting. While training keeps up, batches stay
// small enough to commit within Target: a commit (and the refresh of every
// API's copy after it) follows soon after each arrival, and no refresh is
// large. When a batch comes back full, more was waiting than the limit: the
// policy is behind, and each further full batch doubles the limit up to the
// maximum, where batches fold the most updates per written pair and train
// the most steps per second. The first batch that is not full returns to
// the small size.
type BatchSizer struct {
	// Target is how long a batch should take while training keeps up.
	Target time.Duration
	// Min is the smallest limit, whatever the measured cost.
	Min int

	mu       sync.Mutex
	policies map[int32]*batchHistory
}

// BatchLimits bound one training or replay transaction: it takes episodes
// in arrival order until it holds Episodes of them or at least Steps steps
// (Steps 0: no bound on steps). The step bound keeps a batch's memory and
// duration in proportion whatever the episodes' lengths; the episode bound
// keeps them so for very short episodes.
type BatchLimits struct {
	Episodes int
	Steps    int
}

// Full reports whether a batch of episodes episodes and steps steps
// reached these limits: more may have been waiting.
func (l BatchLimits) Full(episodes, steps int) bool {
	return episodes >= l.Episodes || (l.Steps > 0 && steps >= l.Steps)
}

type batchHistory struct {
	// perEpisode is a moving average of a batch's time per episode.
	perEpisode time.Duration
	limit      int
}

// Limit is the most episodes the policy's next batch may take, at most
// most.
func (s *BatchSizer) Limit(policyID int32, most int) int {
	s.mu.Lock()
	defer s.mu.Unlock()
	h, ok := s.policies[policyID]
	if !ok {
		// Nothing measured yet: whatever is waiting, up to the maximum.
		return most
	}
	return min(max(h.limit, 1), most)
}

// Failed records a batch of the policy that did not commit (it timed out,
// say) after reading episodes episodes (0: unknown): the next takes half
// as many, down to Min, so that a batch too large for its time limit is
// not retried as it was forever.
func (s *BatchSizer) Failed(policyID int32, episodes, limit int) {
	if episodes < 1 {
		episodes = limit
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.policies == nil {
		s.policies = map[int32]*batchHistory{}
	}
	h, ok := s.policies[policyID]
	if !ok {
		h = &batchHistory{}
		s.policies[policyID] = h
	}
	h.limit = max(episodes/2, s.Min, 1)
}

// Observe records a committed batch of the policy: how many episodes it
// took, whether it was full (it reached its limits, so more may have been
// waiting), and how long it took.
func (s *BatchSizer) Observe(policyID int32, episodes int, full bool, took time.Duration) {
	if episodes < 1 {
		return
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.policies == nil {
		s.policies = map[int32]*batchHistory{}
	}
	h, ok := s.policies[policyID]
	per := took / time.Duration(episodes)
	if !ok {
		h = &batchHistory{perEpisode: per}
		s.policies[policyID] = h
	} else {
		// A quarter of the new measure: one slow batch on a busy machine
		// does not swing the size.
		h.perEpisode = (3*h.perEpisode + per) / 4
	}
	if full {
		// Behind: double, and never shrink because the step bound cut
		// the batch short of its episode limit.
		h.limit = max(2*episodes, h.limit)
		return
	}
	keepUp := s.Min
	if h.perEpisode > 0 {
		keepUp = max(keepUp, int(s.Target/h.perEpisode))
	}
	h.limit = keepUp
}
