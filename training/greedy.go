package training

import "errors"

// ErrNoAnswer says greedy has no action it can stand behind in the state (no
// allowed action tried enough there, and no allowed fallback).
var ErrNoAnswer = errors.New("no greedy answer")

// GreedyRule says which actions may be greedy in a state: those tried there
// at least MinVisits times, and at least once unless Untried lets an
// untried action compete with the initial value.
type GreedyRule struct {
	MinVisits int64
	Untried   bool
}

// GreedyRule is the settings' rule for greedy actions.
func (s Settings) GreedyRule() GreedyRule {
	return GreedyRule{MinVisits: s.GreedyMinVisits, Untried: s.GreedyUntried}
}

// threshold is the fewest visits that make an action eligible.
func (r GreedyRule) threshold() int64 {
	if r.Untried {
		return r.MinVisits
	}
	return max(r.MinVisits, 1)
}

// GreedySet is which of a state's allowed actions are greedy. Choosing and
// evaluation's target policy both take it from GreedyRule.Find, so that an
// evaluation evaluates what choose serves.
type GreedySet struct {
	top float64
	// least is the fewest visits of an eligible action.
	least int64
	// Size counts the greedy actions; 0 means greedy has no answer.
	Size int
	// Fallback is the position of the fallback action when, nothing being
	// tried enough, it stands in as the only greedy action; else -1.
	Fallback int
	// all: nothing tried enough and no fallback, so exploring treats every
	// action alike.
	all bool
}

// Find returns the greedy set among actions of values q and visit counts
// visits (nil: every action counts as tried enough). fallback is the
// position of the policy's fallback action among them, or -1. The greedy
// actions are the eligible ones of highest value; when none is eligible the
// fallback is the only one, and without one greedy mode has no answer while
// explore mode treats every action as tied. It does not allocate.
func (r GreedyRule) Find(q []float64, visits []int64, fallback int, mode Mode) GreedySet {
	g := GreedySet{least: r.threshold(), Fallback: -1}
	if visits == nil {
		g.top, g.Size = q[0], 0
		for _, v := range q {
			switch {
			case v > g.top:
				g.top, g.Size = v, 1
			case v == g.top:
				g.Size++
			}
		}
		return g
	}
	for i, v := range q {
		if visits[i] < g.least {
			continue
		}
		switch {
		case g.Size == 0 || v > g.top:
			g.top, g.Size = v, 1
		case v == g.top:
			g.Size++
		}
	}
	switch {
	case g.Size > 0:
	case fallback >= 0:
		g.Fallback, g.Size = fallback, 1
	case mode == Explore:
		g.all, g.Size = true, len(q)
	}
	return g
}

// Has reports whether action i is greedy.
func (g *GreedySet) Has(i int, q []float64, visits []int64) bool {
	switch {
	case g.Fallback >= 0:
		return i == g.Fallback
	case g.all:
		return true
	}
	return g.Size > 0 && q[i] == g.top && (visits == nil || visits[i] >= g.least)
}

// nth is the position of the k-th greedy action.
func (g *GreedySet) nth(q []float64, visits []int64, k int) int {
	switch {
	case g.Fallback >= 0:
		return g.Fallback
	case g.all:
		return k
	}
	for i, v := range q {
		if v == g.top && (visits == nil || visits[i] >= g.least) {
			if k == 0 {
				return i
			}
			k--
		}
	}
	panic("training: greedy index out of range")
}

// First is the position of the first greedy action; the set must not be
// empty.
func (g *GreedySet) First(q []float64, visits []int64) int { return g.nth(q, visits, 0) }

// Probability is the chance the rule gives action i in this set: see
// ActionProbability; 0 for every action when greedy has no answer.
func (g *GreedySet) Probability(mode Mode, epsilon float64, i int, q []float64, visits []int64) float64 {
	if g.Size == 0 {
		return 0
	}
	return ActionProbability(mode, epsilon, len(q), g.Size, g.Has(i, q, visits))
}
