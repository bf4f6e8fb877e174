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

// ChoicePoint is what was chosen in one stretch of time.
type ChoicePoint struct {
	Start time.Time
	// ByAction counts the choices of each action index.
	ByAction []int64
	Total    int64
	Explored int64
	// Unknown counts choices in states with no estimate yet.
	Unknown int64
}

// ChoiceView is the choices of a span binned into points of Step.
type ChoiceView struct {
	Step   time.Duration
	Points []ChoicePoint
}

// Choices bins the report's choice counts over [from, to] into at most
// maxPoints points, each a whole number of stored buckets, aligned as the
// buckets are.
func (r PolicyReport) Choices(from, to time.Time, maxPoints int) ChoiceView {
	widest := time.Duration(0)
	for _, b := range r.ChoiceBuckets {
		widest = max(widest, b.Width)
	}
	if widest == 0 {
		widest = time.Minute
	}
	v := ChoiceView{Step: HistoryStep(to.Sub(from), widest, maxPoints)}
	start := alignDown(from, v.Step)
	for _, b := range r.ChoiceBuckets {
		if b.Start.Before(start) || b.Start.After(to) {
			continue
		}
		at := alignDown(b.Start, v.Step)
		if n := len(v.Points); n == 0 || !v.Points[n-1].Start.Equal(at) {
			v.Points = append(v.Points, ChoicePoint{Start: at})
		}
		p := &v.Points[len(v.Points)-1]
		for int(b.Action) >= len(p.ByAction) {
			p.ByAction = append(p.ByAction, 0)
		}
		p.ByAction[b.Action] += b.Count
		p.Total += b.Count
		if b.Explored {
			p.Explored += b.Count
		}
		if !b.KnownState {
			p.Unknown += b.Count
		}
	}
	return v
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
