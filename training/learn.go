package training

import "math"

// Returns fills dst with the discounted return from every step,
// G_t = R_{t+1} + gamma G_{t+1}, computed backwards from G_T = 0, where
// rewards[t] is the reward that followed the action at step t.
func Returns(rewards []float64, gamma float64, dst []float64) []float64 {
	if cap(dst) < len(rewards) {
		dst = make([]float64, len(rewards))
	}
	dst = dst[:len(rewards)]
	g := 0.0
	for t := len(rewards) - 1; t >= 0; t-- {
		g = rewards[t] + gamma*g
		dst[t] = g
	}
	return dst
}

// ConstantStep moves an estimate a fraction alpha of the way to a target,
// Q <- Q + alpha (G - Q), and returns the new value and the change.
func ConstantStep(q, target, alpha float64) (float64, float64) {
	delta := alpha * (target - q)
	return q + delta, delta
}

// PairKey names one action-value pair; the action is its index.
type PairKey struct {
	State  string
	Action int16
}

// Estimate is what is known of one pair.
type Estimate struct {
	Q         float64
	Visits    int64
	LastDelta float64
}

// BatchInput is one policy's batch of episodes, in arrival order, and the
// stored estimates of every pair of every state the batch touches.
type BatchInput struct {
	Policy   Policy
	Episodes []StoredEpisode
	Current  map[PairKey]Estimate
}

// PairResult is a pair's estimate after the batch.
type PairResult struct {
	PairKey
	Estimate
}

// BatchResult is what a batch changed and what it observed.
type BatchResult struct {
	// Pairs holds the final estimate of every pair the batch updated.
	Pairs []PairResult
	// EpisodeReturns is G_0 of each episode, in order.
	EpisodeReturns []float64
	// AbsDeltas is |delta Q| of every update, in order.
	AbsDeltas []float64
	Steps     int
	// GreedyChanges counts states whose set of greedy actions changed.
	GreedyChanges int
}

// TouchedStates lists, once each, the states a batch's episodes visit.
func TouchedStates(episodes []StoredEpisode) []string {
	seen := make(map[string]struct{})
	var states []string
	for _, ep := range episodes {
		for _, s := range ep.States {
			if _, ok := seen[s]; !ok {
				seen[s] = struct{}{}
				states = append(states, s)
			}
		}
	}
	return states
}

// Learn applies Monte Carlo constant-step updates for a batch exactly as if
// they were applied one after another: episodes in arrival order and, within
// an episode, from the last step back to the first as the returns are
// computed. Under the first-visit rule only a pair's earliest occurrence in
// an episode updates it. The result equals that sequential computation bit
// for bit, so a batch can be written with one set-based statement.
func Learn(in BatchInput) BatchResult {
	p := in.Policy
	work := make(map[PairKey]*Estimate, len(in.Current))
	get := func(k PairKey) *Estimate {
		if e, ok := work[k]; ok {
			return e
		}
		e := &Estimate{Q: p.InitialQ}
		if cur, ok := in.Current[k]; ok {
			*e = cur
		}
		work[k] = e
		return e
	}
	var res BatchResult
	var order []PairKey
	updated := make(map[PairKey]bool)
	firstSeen := make(map[PairKey]int)
	for _, ep := range in.Episodes {
		n := len(ep.States)
		res.Steps += n
		if p.Visit == FirstVisit {
			clear(firstSeen)
			for t := n - 1; t >= 0; t-- {
				firstSeen[PairKey{ep.States[t], ep.Actions[t]}] = t
			}
		}
		g := 0.0
		for t := n - 1; t >= 0; t-- {
			g = ep.Rewards[t] + p.Gamma*g
			k := PairKey{ep.States[t], ep.Actions[t]}
			if p.Visit == FirstVisit && firstSeen[k] != t {
				continue
			}
			e := get(k)
			var delta float64
			e.Q, delta = ConstantStep(e.Q, g, p.Alpha)
			e.Visits++
			e.LastDelta = delta
			res.AbsDeltas = append(res.AbsDeltas, math.Abs(delta))
			if !updated[k] {
				updated[k] = true
				order = append(order, k)
			}
		}
		res.EpisodeReturns = append(res.EpisodeReturns, g)
	}
	res.Pairs = make([]PairResult, len(order))
	for i, k := range order {
		res.Pairs[i] = PairResult{PairKey: k, Estimate: *work[k]}
	}
	res.GreedyChanges = countGreedyChanges(p, in.Current, work, order)
	return res
}

// countGreedyChanges compares, for each updated state, the set of greedy
// actions before and after the batch.
func countGreedyChanges(p Policy, before map[PairKey]Estimate, after map[PairKey]*Estimate, updated []PairKey) int {
	nActions := len(p.Actions)
	qBefore := make([]float64, nActions)
	qAfter := make([]float64, nActions)
	done := make(map[string]bool)
	changes := 0
	for _, k := range updated {
		if done[k.State] {
			continue
		}
		done[k.State] = true
		for a := range nActions {
			key := PairKey{k.State, int16(a)}
			qBefore[a], qAfter[a] = p.InitialQ, p.InitialQ
			if e, ok := before[key]; ok {
				qBefore[a] = e.Q
			}
			if e, ok := after[key]; ok {
				qAfter[a] = e.Q
			} else if e, ok := before[key]; ok {
				qAfter[a] = e.Q
			}
		}
		if !sameGreedySet(qBefore, qAfter) {
			changes++
		}
	}
	return changes
}

func sameGreedySet(a, b []float64) bool {
	maxA, maxB := maxOf(a), maxOf(b)
	for i := range a {
		if (a[i] == maxA) != (b[i] == maxB) {
			return false
		}
	}
	return true
}

func maxOf(xs []float64) float64 {
	m := math.Inf(-1)
	for _, x := range xs {
		m = math.Max(m, x)
	}
	return m
}
