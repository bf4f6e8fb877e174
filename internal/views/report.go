package views

import (
	"time"

	"github.com/qtally/qtally/training"
)

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
	// Backlog is the latest untrained episode count sampled in the
	// stretch; nil when none was.
	Backlog *int64
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

// HistoryStep is the stretch of time one point of a span covers: a whole
// number of stored buckets, so that no bucket is split, and at most
// maxPoints points over the span.
func HistoryStep(span, bucket time.Duration, maxPoints int) time.Duration {
	buckets := int64((span + bucket*time.Duration(maxPoints) - 1) / (bucket * time.Duration(maxPoints)))
	return bucket * time.Duration(max(buckets, 1))
}

// PolicyReport is what the status page shows of one policy.
type PolicyReport struct {
	Status PolicyStatus
	// Now is the database's clock when the report was read.
	Now    time.Time
	Window time.Duration
	// Buckets are the stored history rows that start within the window,
	// oldest first.
	Buckets []training.HistoryBucket
	// ChoiceBuckets are the stored choice counts that start within the
	// window, oldest first; Events are what was done to the policy within
	// the window, oldest first.
	ChoiceBuckets []training.ChoiceBucket
	Events        []training.PolicyEvent
	// MostDrift and MostVisited are the states whose latest update moved
	// an estimate most, and the states visited most.
	MostDrift   []StateSummary
	MostVisited []StateSummary
}

// HistoryView is a stretch of history binned into points of Step, the
// first starting at From.
type HistoryView struct {
	From, To time.Time
	Step     time.Duration
	Points   []HistoryPoint
}

// Timeline bins the history from the start of the window, or of the
// policy's first recorded activity when that is later, up to now: a young
// policy's whole life fills the chart.
func (r PolicyReport) Timeline(maxPoints int) HistoryView {
	return r.bin(r.ActiveSince(), r.Now, maxPoints)
}

// ActiveSince is the start of the window, or when the first training,
// choice or event within it happened if that is later.
func (r PolicyReport) ActiveSince() time.Time {
	from := r.Now.Add(-r.Window)
	first := r.Now
	if len(r.Buckets) > 0 {
		first = r.Buckets[0].Start
	}
	if len(r.ChoiceBuckets) > 0 && r.ChoiceBuckets[0].Start.Before(first) {
		first = r.ChoiceBuckets[0].Start
	}
	if len(r.Events) > 0 && r.Events[0].At.Before(first) {
		first = r.Events[0].At
	}
	if len(r.Buckets)+len(r.ChoiceBuckets)+len(r.Events) > 0 && first.After(from) {
		return first
	}
	return from
}

// Progress bins the history from its first stored training to its last,
// so that time without training does not thin out the learning curve.
func (r PolicyReport) Progress(maxPoints int) HistoryView {
	if len(r.Buckets) == 0 {
		return HistoryView{From: r.Now, To: r.Now, Step: time.Second}
	}
	last := r.Buckets[0].Start
	for _, b := range r.Buckets {
		if end := b.Start.Add(b.Width); end.After(last) {
			last = end
		}
	}
	return r.bin(r.Buckets[0].Start, last, maxPoints)
}

// bin sums the buckets into points of equal length covering [from, to],
// and works the coverage at the end of each point back from today's counts
// by taking off what later buckets added. Points are as long as a whole
// number of the widest bucket in range and aligned as buckets are (to the
// Unix epoch), so that no bucket is split between points.
func (r PolicyReport) bin(from, to time.Time, maxPoints int) HistoryView {
	widest := time.Duration(0)
	for _, b := range r.Buckets {
		if !b.Start.Before(from) && b.Start.Before(to) {
			widest = max(widest, b.Width)
		}
	}
	if widest == 0 {
		widest = time.Second
	}
	step := HistoryStep(to.Sub(from), widest, maxPoints)
	v := HistoryView{From: alignDown(from, step), To: to, Step: step}
	// Suffix sums of what each bucket and every later one added.
	laterStates, laterPairs := make([]int64, len(r.Buckets)+1), make([]int64, len(r.Buckets)+1)
	for i := len(r.Buckets) - 1; i >= 0; i-- {
		laterStates[i] = laterStates[i+1] + r.Buckets[i].NewStates
		laterPairs[i] = laterPairs[i+1] + r.Buckets[i].NewPairs
	}
	for i, b := range r.Buckets {
		if b.Start.Before(v.From) || !b.Start.Before(to) {
			continue
		}
		start := alignDown(b.Start, step)
		if n := len(v.Points); n == 0 || !v.Points[n-1].Start.Equal(start) {
			v.Points = append(v.Points, HistoryPoint{Start: start})
		}
		p := &v.Points[len(v.Points)-1]
		p.Batches += b.Batches
		p.Episodes += b.Episodes
		p.Steps += b.Steps
		p.SumReturn += b.SumReturn
		p.SumAbsDelta += b.SumAbsDelta
		p.Updates += b.Updates
		p.GreedyChanges += b.GreedyChanges
		if b.Backlog != nil {
			p.Backlog = b.Backlog
		}
		p.States = max(r.Status.States-laterStates[i+1], 0)
		p.Pairs = max(r.Status.Pairs-laterPairs[i+1], 0)
	}
	return v
}

// alignDown is the start of the stretch of length step, counted from the
// Unix epoch, that holds t.
func alignDown(t time.Time, step time.Duration) time.Time {
	us, stepUS := t.UnixMicro(), step.Microseconds()
	return time.UnixMicro(us - ((us%stepUS)+stepUS)%stepUS).UTC()
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
