package training

import "errors"

// ErrNoAnswer: greedy has no action it can stand behind in the state (no
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

func (r GreedyRule) eligible(visits int64) bool {
	return visits >= r.MinVisits && (r.Untried || visits > 0)
}

// GreedySet is which of a state's allowed actions are greedy. Choosing and
// evaluation's target policy both take it from GreedyRule.Find, so that an
// evaluation evaluates what choose serves.
type GreedySet struct {
	rule GreedyRule
	top  float64
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
	g := GreedySet{rule: r, Fallback: -1}
	for i, v := range q {
		if visits != nil && !r.eligible(visits[i]) {
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
func (g GreedySet) Has(i int, q []float64, visits []int64) bool {
	switch {
	case g.Fallback >= 0:
		return i == g.Fallback
	case g.all:
		return true
	case g.Size == 0:
		return false
	}
	return q[i] == g.top && (visits == nil || g.rule.eligible(visits[i]))
}

// nth is the position of the k-th greedy action.
func (g GreedySet) nth(q []float64, visits []int64, k int) int {
	for i := range q {
		if g.Has(i, q, visits) {
			if k == 0 {
				return i
			}
			k--
		}
	}
	panic("training: greedy index out of range")
}

// Probability is the chance the rule gives action i in this set: see
// ActionProbability; 0 for every action when greedy has no answer.
func (g GreedySet) Probability(mode Mode, epsilon float64, i int, q []float64, visits []int64) float64 {
	if g.Size == 0 {
		return 0
	}
	return ActionProbability(mode, epsilon, len(q), g.Size, g.Has(i, q, visits))
}
