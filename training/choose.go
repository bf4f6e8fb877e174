package training

import "math/rand/v2"

// Mode says how an action is chosen.
type Mode string

const (
	// Explore chooses epsilon-soft: mostly greedy, sometimes any action.
	Explore Mode = "explore"
	// Greedy chooses an action of highest estimated value.
	Greedy Mode = "greedy"
)

// Choice is an action chosen among the allowed ones, by position in the
// slice of values the caller gave.
type Choice struct {
	Action int
	// Probability is the chance the rule gave the chosen action.
	Probability float64
	// Explored is true when the chosen action is not a greedy one.
	Explored bool
	// Greedy is a greedy action (the chosen one when it is greedy).
	Greedy int
}

// ActionProbability is the chance the rule gives an action whose value is
// tied at the top with g-1 others (greedy) or not (greedy=false), among n
// allowed actions: (1-epsilon)/g + epsilon/n for a greedy action and
// epsilon/n for any other; in Greedy mode 1/g and 0.
func ActionProbability(mode Mode, epsilon float64, n, g int, greedy bool) float64 {
	if mode == Greedy {
		epsilon = 0
	}
	p := epsilon / float64(n)
	if greedy {
		p += (1 - epsilon) / float64(g)
	}
	return p
}

// Random is the source of randomness for choosing. *rand.Rand satisfies it;
// SharedRandom is safe for concurrent use.
type Random interface {
	Float64() float64
	IntN(n int) int
}

type sharedRandom struct{}

func (sharedRandom) Float64() float64 { return rand.Float64() }
func (sharedRandom) IntN(n int) int   { return rand.IntN(n) }

// SharedRandom draws from the runtime's per-thread generator: no lock,
// safe from any goroutine.
var SharedRandom Random = sharedRandom{}

// Choose picks an action among the allowed ones given their values q.
// Ties at the top are split uniformly at random. It does not allocate.
func Choose(q []float64, mode Mode, epsilon float64, rng Random) Choice {
	n := len(q)
	top, ties := greedyTop(q)
	greedy := nthTie(q, top, rng.IntN(ties))
	chosen := greedy
	if mode == Explore && epsilon > 0 && rng.Float64() < epsilon {
		chosen = rng.IntN(n)
	}
	isGreedy := q[chosen] == top
	if isGreedy {
		greedy = chosen
	}
	return Choice{
		Action:      chosen,
		Probability: ActionProbability(mode, epsilon, n, ties, isGreedy),
		Explored:    !isGreedy,
		Greedy:      greedy,
	}
}

// greedyTop is the highest of the values and how many share it.
func greedyTop(q []float64) (top float64, ties int) {
	top = q[0]
	for _, v := range q {
		switch {
		case v > top:
			top, ties = v, 1
		case v == top:
			ties++
		}
	}
	return top, ties
}

// ProbabilitiesAmong gives, for every action of a state with values q (by
// action index), the chance that Choose gives it when it chooses among the
// allowed actions only (every action when allowed is nil) with this mode
// and epsilon: the greedy ones counted among the allowed, epsilon spread
// over the allowed count, 0 outside the set. Evaluation takes a target's
// probabilities from here, so they are the ones choose reports.
func ProbabilitiesAmong(q []float64, allowed ActionSet, mode Mode, epsilon float64) []float64 {
	among := make([]float64, 0, len(q))
	for a, v := range q {
		if allowed == nil || allowed.Has(int16(a)) {
			among = append(among, v)
		}
	}
	probs := make([]float64, len(q))
	if len(among) == 0 {
		return probs
	}
	top, ties := greedyTop(among)
	for a, v := range q {
		if allowed == nil || allowed.Has(int16(a)) {
			probs[a] = ActionProbability(mode, epsilon, len(among), ties, v == top)
		}
	}
	return probs
}

func nthTie(q []float64, top float64, k int) int {
	for i, v := range q {
		if v == top {
			if k == 0 {
				return i
			}
			k--
		}
	}
	panic("training: tie index out of range")
}
