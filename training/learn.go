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
	ix := indexBatch(in)
	res := BatchResult{EpisodeReturns: make([]float64, 0, len(in.Episodes)), AbsDeltas: make([]float64, 0, len(ix.stepPair))}
	// The replay touches only slices: every step's pair was numbered once.
	est := ix.before()
	order := make([]int32, 0, len(ix.pairs))
	updated := make([]bool, len(ix.pairs))
	firstStep := make([]int32, len(ix.pairs))
	off := 0
	for _, ep := range in.Episodes {
		n := len(ep.States)
		steps := ix.stepPair[off : off+n]
		off += n
		res.Steps += n
		if p.Visit == FirstVisit {
			for t := n - 1; t >= 0; t-- {
				firstStep[steps[t]] = int32(t)
			}
		}
		g := 0.0
		for t := n - 1; t >= 0; t-- {
			g = ep.Rewards[t] + p.Gamma*g
			i := steps[t]
			if p.Visit == FirstVisit && firstStep[i] != int32(t) {
				continue
			}
			e := &est[i]
			var delta float64
			e.Q, delta = ConstantStep(e.Q, g, p.Alpha)
			e.Visits++
			e.LastDelta = delta
			res.AbsDeltas = append(res.AbsDeltas, math.Abs(delta))
			if !updated[i] {
				updated[i] = true
				order = append(order, i)
			}
		}
		res.EpisodeReturns = append(res.EpisodeReturns, g)
	}
	res.Pairs = make([]PairResult, len(order))
	for j, i := range order {
		pr := ix.pairs[i]
		res.Pairs[j] = PairResult{PairKey: PairKey{ix.states[pr.state], pr.action}, Estimate: est[i]}
	}
	res.GreedyChanges = ix.countGreedyChanges(p, est, order)
	return res
}

// batchIndex numbers a batch's states and pairs so that learning works on
// slices. A state's pairs, and its stored estimates, are chained lists
// through index slices: a state has a few of each, and chains need no
// allocation per state.
type batchIndex struct {
	states   []string
	pairs    []batchPair
	stepPair []int32 // the pair of every step, episodes one after another
	// firstPair and firstStored head each state's chains (-1: none).
	firstPair, firstStored []int32
	stored                 []storedPair
	initialQ               float64
}

type batchPair struct {
	state  int32
	action int16
	next   int32 // next pair of the same state, -1 at the end
}

type storedPair struct {
	action int16
	est    Estimate
	next   int32
}

func indexBatch(in BatchInput) *batchIndex {
	total := 0
	for _, ep := range in.Episodes {
		total += len(ep.States)
	}
	// Sized for about two steps per state, so growing is rare.
	ix := &batchIndex{stepPair: make([]int32, 0, total), initialQ: in.Policy.InitialQ,
		states: make([]string, 0, total/2), firstPair: make([]int32, 0, total/2),
		pairs: make([]batchPair, 0, total/2), stored: make([]storedPair, 0, len(in.Current))}
	stateOf := make(map[string]int32, total/2)
	for _, ep := range in.Episodes {
		for t, s := range ep.States {
			si, ok := stateOf[s]
			if !ok {
				si = int32(len(ix.states))
				stateOf[s] = si
				ix.states = append(ix.states, s)
				ix.firstPair = append(ix.firstPair, -1)
			}
			ix.stepPair = append(ix.stepPair, ix.pair(si, ep.Actions[t]))
		}
	}
	ix.firstStored = make([]int32, len(ix.states))
	for i := range ix.firstStored {
		ix.firstStored[i] = -1
	}
	for k, e := range in.Current {
		if si, ok := stateOf[k.State]; ok {
			ix.stored = append(ix.stored, storedPair{action: k.Action, est: e, next: ix.firstStored[si]})
			ix.firstStored[si] = int32(len(ix.stored) - 1)
		}
	}
	return ix
}

// pair returns the number of (state si, action a), numbering it if new.
func (ix *batchIndex) pair(si int32, a int16) int32 {
	for i := ix.firstPair[si]; i >= 0; i = ix.pairs[i].next {
		if ix.pairs[i].action == a {
			return i
		}
	}
	ix.pairs = append(ix.pairs, batchPair{state: si, action: a, next: ix.firstPair[si]})
	ix.firstPair[si] = int32(len(ix.pairs) - 1)
	return ix.firstPair[si]
}

// before returns every pair's estimate before the batch: stored, or
// unseen at the policy's initial value.
func (ix *batchIndex) before() []Estimate {
	est := make([]Estimate, len(ix.pairs))
	for i := range est {
		est[i] = Estimate{Q: ix.initialQ}
	}
	for si := range ix.states {
		for j := ix.firstStored[si]; j >= 0; j = ix.stored[j].next {
			sp := ix.stored[j]
			for i := ix.firstPair[si]; i >= 0; i = ix.pairs[i].next {
				if ix.pairs[i].action == sp.action {
					est[i] = sp.est
				}
			}
		}
	}
	return est
}

// countGreedyChanges compares, for each updated state, the set of greedy
// actions before and after the batch.
func (ix *batchIndex) countGreedyChanges(p Policy, after []Estimate, updated []int32) int {
	nActions := len(p.Actions)
	qBefore := make([]float64, nActions)
	qAfter := make([]float64, nActions)
	done := make([]bool, len(ix.states))
	changes := 0
	for _, i := range updated {
		si := ix.pairs[i].state
		if done[si] {
			continue
		}
		done[si] = true
		for a := range qBefore {
			qBefore[a] = p.InitialQ
		}
		for j := ix.firstStored[si]; j >= 0; j = ix.stored[j].next {
			if a := int(ix.stored[j].action); a >= 0 && a < nActions {
				qBefore[a] = ix.stored[j].est.Q
			}
		}
		copy(qAfter, qBefore)
		for k := ix.firstPair[si]; k >= 0; k = ix.pairs[k].next {
			if a := int(ix.pairs[k].action); a >= 0 && a < nActions {
				qAfter[a] = after[k].Q
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
