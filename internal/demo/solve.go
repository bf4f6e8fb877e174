package demo

import (
	"math"
	"slices"
)

// Policy gives, for a state, the probability of each action, indexed in
// Actions order.
type Policy func(State) []float64

// Values holds exact expected discounted returns for every state of
// States: V per state and Q per state and action.
type Values struct {
	Gamma float64
	V     map[State]float64
	Q     map[State][]float64
}

// Start is the expected return of a whole episode: V averaged over the
// start-state distribution.
func (v Values) Start() float64 {
	var total float64
	for _, st := range Starts() {
		total += st.Prob * v.V[st.State]
	}
	return total
}

// Optimal computes the optimal values by backward induction: the state
// graph is acyclic, so one sweep from the last day to the first is exact.
func Optimal(gamma float64) Values {
	return backward(gamma, func(_ State, q []float64) float64 { return slices.Max(q) })
}

// Evaluate computes the exact values of a stochastic policy, again in one
// backward sweep.
func Evaluate(policy Policy, gamma float64) Values {
	return backward(gamma, func(s State, q []float64) float64 {
		var v float64
		for a, p := range policy(s) {
			v += p * q[a]
		}
		return v
	})
}

// backward fills Q from successors' V, then V from Q with combine, walking
// States from the last day to the first.
func backward(gamma float64, combine func(State, []float64) float64) Values {
	states := States()
	values := Values{
		Gamma: gamma,
		V:     make(map[State]float64, len(states)),
		Q:     make(map[State][]float64, len(states)),
	}
	for _, s := range slices.Backward(states) {
		q := make([]float64, numActions)
		for _, a := range Actions() {
			q[a] = expectedReturn(s, a, gamma, values.V)
		}
		values.Q[s] = q
		values.V[s] = combine(s, q)
	}
	return values
}

// expectedReturn is sum over outcomes of p * (r + gamma * v(next)).
func expectedReturn(s State, a Action, gamma float64, v map[State]float64) float64 {
	var total float64
	for _, o := range Transitions(s, a) {
		g := o.Reward
		if !o.Done {
			g += gamma * v[o.Next]
		}
		total += o.Prob * g
	}
	return total
}

// Uniform is the uniformly random policy.
func Uniform(State) []float64 {
	p := make([]float64, numActions)
	for a := range p {
		p[a] = 1 / float64(numActions)
	}
	return p
}

// RandomValue is the expected return of the uniformly random policy.
func RandomValue(gamma float64) float64 {
	return Evaluate(Uniform, gamma).Start()
}

// Greedy is the policy that takes the action with the highest Q, splitting
// ties uniformly. A state missing from q has all actions tied, as it would
// on a service that has never seen it. Ties are exact equality: values the
// service never updated are all exactly its initial Q.
func Greedy(q map[State][]float64) Policy {
	return func(s State) []float64 {
		row, ok := q[s]
		if !ok {
			return Uniform(s)
		}
		best := slices.Max(row)
		p := make([]float64, len(row))
		var ties float64
		for a, v := range row {
			if v == best {
				p[a] = 1
				ties++
			}
		}
		for a := range p {
			p[a] /= ties
		}
		return p
	}
}

// BestActions lists the actions whose Q is highest in state s.
func (v Values) BestActions(s State) []Action {
	var best []Action
	for a, p := range Greedy(v.Q)(s) {
		if p > 0 {
			best = append(best, Action(a))
		}
	}
	return best
}

// Fixed is the policy that takes action a in every state.
func Fixed(a Action) Policy {
	return func(State) []float64 {
		p := make([]float64, numActions)
		p[a] = 1
		return p
	}
}

// BestFixedAction is the action whose fixed policy is worth most from the
// start distribution, with that value: the plainest rule an application
// could follow without learning anything.
func BestFixedAction(gamma float64) (Action, float64) {
	best, value := Action(0), math.Inf(-1)
	for _, a := range Actions() {
		if v := Evaluate(Fixed(a), gamma).Start(); v > value {
			best, value = a, v
		}
	}
	return best, value
}

// EpsilonSoft is the policy that explore mode runs on a table q: in each
// state, with epsilon(s) its exploration rate, each of the g actions tied
// for the highest Q gets (1 - epsilon)/g + epsilon/|A| and every other
// action epsilon/|A|. A state missing from q has every action tied.
func EpsilonSoft(q map[State][]float64, epsilon func(State) float64) Policy {
	greedy := Greedy(q)
	return func(s State) []float64 {
		eps := epsilon(s)
		p := greedy(s)
		for a := range p {
			p[a] = (1-eps)*p[a] + eps/float64(numActions)
		}
		return p
	}
}
