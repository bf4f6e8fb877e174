package training

import (
	"cmp"
	"context"
	"slices"
	"sync"
	"sync/atomic"
	"time"
)

// ChoiceCount is how many choices of one kind an API process made for a
// policy since it last handed its counts to the store.
type ChoiceCount struct {
	PolicyID int32
	// Action is the index of the chosen action in the policy's actions.
	Action     int16
	Explore    bool // chosen in explore mode, else greedy
	Explored   bool
	KnownState bool
	Count      int64
}

// ChoiceStore keeps choice counts so that every process's choices show
// on the status page, whichever process serves it.
type ChoiceStore interface {
	AddChoiceCounts(ctx context.Context, counts []ChoiceCount) error
}

// choiceKinds is how many kinds of choice are counted per action: mode,
// explored and known state.
const choiceKinds = 8

// choiceTally counts a table's choices in memory: choosing only adds to
// a counter, and a flush takes the counts away.
type choiceTally struct {
	counts []atomic.Int64
}

func newChoiceTally(actions int) *choiceTally {
	return &choiceTally{counts: make([]atomic.Int64, actions*choiceKinds)}
}

func (t *choiceTally) add(action int16, mode Mode, explored, known bool) {
	kind := choiceKind(ChoiceCount{Explore: mode == Explore, Explored: explored, KnownState: known})
	t.counts[int(action)*choiceKinds+kind].Add(1)
}

// take appends the counts made since the last take and zeroes them.
func (t *choiceTally) take(policyID int32, out []ChoiceCount) []ChoiceCount {
	for i := range t.counts {
		if n := t.counts[i].Swap(0); n > 0 {
			k := i % choiceKinds
			out = append(out, ChoiceCount{PolicyID: policyID, Action: int16(i / choiceKinds),
				Explore: k&4 != 0, Explored: k&2 != 0, KnownState: k&1 != 0, Count: n})
		}
	}
	return out
}

// choiceFlush holds counts taken from the tallies that the store has not
// accepted yet, merged by kind so that an outage keeps them bounded.
type choiceFlush struct {
	mu      sync.Mutex
	pending map[ChoiceCount]int64 // keyed with Count 0
}

// FlushChoices hands the choices counted since the last flush to the
// store. Counts the store refuses are kept and sent with the next flush,
// so nothing is lost or counted twice.
func (r *Replica) FlushChoices(ctx context.Context, store ChoiceStore) error {
	r.flush.mu.Lock()
	defer r.flush.mu.Unlock()
	var taken []ChoiceCount
	r.mu.RLock()
	tables := make([]*replicaTable, 0, len(r.byID))
	for _, t := range r.byID {
		tables = append(tables, t)
	}
	r.mu.RUnlock()
	for _, t := range tables {
		t.mu.Lock()
		taken = t.tally.take(t.policy.ID, taken)
		for _, old := range t.retiredTallies {
			taken = old.take(t.policy.ID, taken)
		}
		t.retiredTallies = nil
		t.mu.Unlock()
	}
	if r.flush.pending == nil {
		r.flush.pending = map[ChoiceCount]int64{}
	}
	for _, c := range taken {
		n := c.Count
		c.Count = 0
		r.flush.pending[c] += n
	}
	if len(r.flush.pending) == 0 {
		return nil
	}
	counts := make([]ChoiceCount, 0, len(r.flush.pending))
	for c, n := range r.flush.pending {
		c.Count = n
		counts = append(counts, c)
	}
	// One order for every process, so that concurrent flushes lock rows
	// in the same order.
	slices.SortFunc(counts, func(a, b ChoiceCount) int {
		return cmp.Or(cmp.Compare(a.PolicyID, b.PolicyID), cmp.Compare(a.Action, b.Action),
			cmp.Compare(choiceKind(a), choiceKind(b)))
	})
	if err := store.AddChoiceCounts(ctx, counts); err != nil {
		return err
	}
	clear(r.flush.pending)
	return nil
}

// choiceKind orders the kinds of choice as a tally's counters do.
func choiceKind(c ChoiceCount) int {
	k := 0
	if c.Explore {
		k += 4
	}
	if c.Explored {
		k += 2
	}
	if c.KnownState {
		k++
	}
	return k
}

// ChoiceBucket is one stored row of choice counts: choices of one kind
// made from Start for Width.
type ChoiceBucket struct {
	Start      time.Time
	Width      time.Duration
	Action     int16
	Explore    bool
	Explored   bool
	KnownState bool
	Count      int64
}

// PolicyEvent is something done to a policy that the status page marks on
// its time charts.
type PolicyEvent struct {
	At   time.Time
	Kind string // "snapshot", "restore", "settings" or "evaluation"
	// Label says what: the snapshot's name, the fields changed, the job.
	Label string
	// Value is an evaluation's weighted estimate of the return, if it has one.
	Value *float64
}
