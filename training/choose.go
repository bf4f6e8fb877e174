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
	// Fallback is true when the chosen action is the fallback standing in
	// for actions not tried enough.
	Fallback bool
	// NoAnswer is true when greedy mode has no action to answer.
	NoAnswer bool
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

// Choose picks an action among the allowed ones given their values q, each
// counted as tried enough. Ties at the top are split uniformly at random.
// It does not allocate.
func Choose(q []float64, mode Mode, epsilon float64, rng Random) Choice {
	return ChooseWith(q, nil, GreedyRule{Untried: true}, -1, mode, epsilon, rng)
}

// ChooseWith picks an action among the allowed ones given their values q,
// their visit counts in the state and the greedy rule; fallback is the
// fallback action's position among them, or -1. Choice.NoAnswer is set when
// greedy mode has nothing it can answer. It does not allocate.
func ChooseWith(q []float64, visits []int64, rule GreedyRule, fallback int, mode Mode, epsilon float64, rng Random) Choice {
	n := len(q)
	g := rule.Find(q, visits, fallback, mode)
	if g.Size == 0 {
		return Choice{Action: -1, Greedy: -1, NoAnswer: true}
	}
	greedy := g.nth(q, visits, rng.IntN(g.Size))
	chosen := greedy
	if mode == Explore && epsilon > 0 && rng.Float64() < epsilon {
		chosen = rng.IntN(n)
	}
	isGreedy := g.Has(chosen, q, visits)
	if isGreedy {
		greedy = chosen
	}
	return Choice{
		Action:      chosen,
		Probability: ActionProbability(mode, epsilon, n, g.Size, isGreedy),
		Explored:    !isGreedy,
		Greedy:      greedy,
		Fallback:    chosen == g.Fallback,
	}
}

// ProbabilitiesAmong gives, for every action of a state with values q and
// visit counts visits (by action index; nil visits: every action counts as
// tried enough), the chance that choosing gives it when it chooses among
// the allowed actions only (every action when allowed is nil) with this
// greedy rule, fallback action (an action index, or -1), mode and epsilon:
// the greedy ones found among the allowed, epsilon spread over the allowed
// count, 0 outside the set, and 0 everywhere when greedy has no answer.
// Evaluation takes a target's probabilities from here and choosing its
// greedy set from the same GreedyRule.Find, so they are the ones choose
// reports.
func ProbabilitiesAmong(q []float64, visits []int64, allowed ActionSet, rule GreedyRule, fallback int, mode Mode, epsilon float64) []float64 {
	amongQ := make([]float64, 0, len(q))
	var amongVisits []int64
	if visits != nil {
		amongVisits = make([]int64, 0, len(q))
	}
	at, fallbackAt := make([]int, 0, len(q)), -1
	for a, v := range q {
		if allowed == nil || allowed.Has(int16(a)) {
			if a == fallback {
				fallbackAt = len(amongQ)
			}
			at = append(at, a)
			amongQ = append(amongQ, v)
			if visits != nil {
				amongVisits = append(amongVisits, visits[a])
			}
		}
	}
	probs := make([]float64, len(q))
	if len(amongQ) == 0 {
		return probs
	}
	g := rule.Find(amongQ, amongVisits, fallbackAt, mode)
	for j, a := range at {
		probs[a] = g.Probability(mode, epsilon, j, amongQ, amongVisits)
	}
	return probs
}
