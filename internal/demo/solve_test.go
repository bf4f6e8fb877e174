package demo

import (
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"gonum.org/v1/gonum/stat"
)

var gammas = []float64{0.9, 0.99, 1}

// bellmanBackup is sum over outcomes of p * (r + gamma * v(next)),
// written out again here rather than borrowed from the solver.
func bellmanBackup(s State, a Action, gamma float64, v map[State]float64) float64 {
	var total float64
	for _, o := range Transitions(s, a) {
		next := 0.0
		if !o.Done {
			nv, ok := v[o.Next]
			if !ok {
				panic("successor without a value: " + o.Next.String())
			}
			next = nv
		}
		total += o.Prob * (o.Reward + gamma*next)
	}
	return total
}

// Bellman optimality equation for v*: v*(s) = max_a sum_{s',r} p(s',r|s,a)
// [r + gamma v*(s')]. Sutton & Barto, Reinforcement Learning: An
// Introduction, 2nd ed., eq. 3.19.
func TestOptimalSatisfiesBellmanOptimality(t *testing.T) {
	for _, gamma := range gammas {
		opt := Optimal(gamma)
		if len(opt.V) != len(States()) {
			t.Fatalf("gamma %v: %d values for %d states", gamma, len(opt.V), len(States()))
		}
		for _, s := range States() {
			best := math.Inf(-1)
			for _, a := range Actions() {
				q := bellmanBackup(s, a, gamma, opt.V)
				best = math.Max(best, q)
				if math.Abs(opt.Q[s][a]-q) > 1e-12 {
					t.Errorf("gamma %v, %s, %s: q* %.15g, backup %.15g", gamma, s, a, opt.Q[s][a], q)
				}
			}
			if math.Abs(opt.V[s]-best) > 1e-12 {
				t.Errorf("gamma %v, %s: v* %.15g, max backup %.15g", gamma, s, opt.V[s], best)
			}
		}
	}
}

// leanPolicy is a stochastic policy unlike the ones the solver produces:
// it leans on one action that depends on the state and spreads the rest.
func leanPolicy(s State) []float64 {
	p := make([]float64, numActions)
	for a := range p {
		p[a] = 0.4 / float64(numActions-1)
	}
	p[(s.Day+int(s.Reason)+s.Messages)%int(numActions)] = 0.6
	return p
}

// Bellman equation for v_pi: v_pi(s) = sum_a pi(a|s) sum_{s',r}
// p(s',r|s,a) [r + gamma v_pi(s')]. Sutton & Barto, Reinforcement
// Learning: An Introduction, 2nd ed., eq. 3.14 (as an update, eq. 4.4).
func TestEvaluateSatisfiesBellmanEquation(t *testing.T) {
	for _, gamma := range gammas {
		for name, policy := range map[string]Policy{"uniform": Uniform, "lean": leanPolicy} {
			v := Evaluate(policy, gamma)
			for _, s := range States() {
				var want float64
				for a, p := range policy(s) {
					want += p * bellmanBackup(s, Action(a), gamma, v.V)
				}
				if math.Abs(v.V[s]-want) > 1e-12 {
					t.Errorf("%s, gamma %v, %s: v %.15g, backup %.15g", name, gamma, s, v.V[s], want)
				}
			}
		}
	}
}

// sampleReturns plays n episodes with the policy and returns each
// discounted return.
func sampleReturns(policy Policy, gamma float64, n int, rng *rand.Rand) []float64 {
	returns := make([]float64, n)
	for i := range returns {
		s := SampleStart(rng)
		discount := 1.0
		for {
			o := Step(s, drawAction(policy(s), rng), rng)
			returns[i] += discount * o.Reward
			discount *= gamma
			if o.Done {
				break
			}
			s = o.Next
		}
	}
	return returns
}

func drawAction(p []float64, rng *rand.Rand) Action {
	u := rng.Float64()
	for a, pa := range p {
		if u < pa {
			return Action(a)
		}
		u -= pa
	}
	return Action(len(p) - 1)
}

// The exact value of a policy must agree with the mean of sampled returns.
// The sample mean is within 4 standard errors of the true mean except with
// probability about 6e-5 (normal approximation by the central limit
// theorem; 4 standard errors is a common-practice bound).
func TestEvaluateMatchesSampledReturns(t *testing.T) {
	const gamma, n = 0.99, 200_000
	opt := Optimal(gamma)
	policies := map[string]Policy{
		"uniform": Uniform,
		"lean":    leanPolicy,
		"optimal": Greedy(opt.Q),
	}
	rng := rand.New(rand.NewPCG(3, 4))
	for name, policy := range policies {
		exact := Evaluate(policy, gamma).Start()
		mean, sd := stat.MeanStdDev(sampleReturns(policy, gamma, n, rng), nil)
		stderr := sd / math.Sqrt(n)
		if math.Abs(mean-exact) > 4*stderr {
			t.Errorf("%s: exact %.4f, sampled %.4f ± %.4f (standard error)", name, exact, mean, stderr)
		}
	}
}

func TestOptimalBeatsRandomClearly(t *testing.T) {
	const gamma = 0.99
	optimal, random := Optimal(gamma).Start(), RandomValue(gamma)
	// Prices are 10 and 20: the gap must be several currency units for the
	// demo to show anything.
	if optimal-random < 5 {
		t.Errorf("optimal %.3f, random %.3f: gap below 5", optimal, random)
	}
	uniformValue := Evaluate(Uniform, gamma).Start()
	if uniformValue != random {
		t.Errorf("RandomValue %.15g differs from evaluating Uniform %.15g", random, uniformValue)
	}
}

// The optimum follows the decline reason the way the scenario intends:
// wait for payday after a low balance, get an out-of-date card replaced
// before retrying, retry at once when the bank refused without saying
// why, and retry as soon as the customer has entered new details.
func TestOptimalFirstActionsFollowTheReason(t *testing.T) {
	opt := Optimal(0.99)
	for p := range numPlans {
		lowBalance := opt.BestActions(State{Reason: LowBalance, Plan: p})
		if slices.Contains(lowBalance, RetryCard) {
			t.Errorf("%s, low balance, day 0: optimal %v includes retry_card", p, lowBalance)
		}
		outOfDate := opt.BestActions(State{Reason: CardOutOfDate, Plan: p})
		for _, a := range outOfDate {
			if a != EmailReminder && a != TextReminder {
				t.Errorf("%s, card out of date, day 0: optimal %v, want a reminder", p, outOfDate)
			}
		}
		refused := opt.BestActions(State{Reason: BankRefused, Plan: p})
		if !slices.Equal(refused, []Action{RetryCard}) {
			t.Errorf("%s, bank refused, day 0: optimal %v, want retry_card", p, refused)
		}
		for r := range numReasons {
			updated := State{Day: 1, Messages: 1, Reason: r, Plan: p, CardUpdated: true}
			if got := opt.BestActions(updated); !slices.Equal(got, []Action{RetryCard}) {
				t.Errorf("%s: optimal %v, want retry_card", updated, got)
			}
		}
	}
	// Retrying after a low-balance decline pays off more as payday nears.
	lowBalanceGain := func(day int) float64 {
		s := State{Day: day, Reason: LowBalance}
		return opt.Q[s][RetryCard] - opt.Q[s][Wait]
	}
	if !(lowBalanceGain(0) < 0 && lowBalanceGain(3) > 0) {
		t.Errorf("retry minus wait, low balance: day 0 %.3f (want < 0), day 3 %.3f (want > 0)", lowBalanceGain(0), lowBalanceGain(3))
	}
}

func TestGreedyOfOptimalQIsOptimal(t *testing.T) {
	for _, gamma := range gammas {
		opt := Optimal(gamma)
		if got := Evaluate(Greedy(opt.Q), gamma).Start(); math.Abs(got-opt.Start()) > 1e-9 {
			t.Errorf("gamma %v: greedy on q* is worth %.12g, optimum %.12g", gamma, got, opt.Start())
		}
	}
}

func TestGreedySplitsTiesEvenly(t *testing.T) {
	s := State{Day: 2, Reason: CardOutOfDate}
	q := map[State][]float64{s: {1, 3, 0, 3, -1, 3}}
	got := Greedy(q)(s)
	want := []float64{0, 1.0 / 3, 0, 1.0 / 3, 0, 1.0 / 3}
	if !slices.Equal(got, want) {
		t.Errorf("greedy probabilities %v, want %v", got, want)
	}
	// A state the table lacks has every action tied.
	if got := Greedy(q)(State{Day: 1}); !slices.Equal(got, Uniform(State{})) {
		t.Errorf("unknown state: %v, want uniform", got)
	}
}

// The value of every fixed action, computed exactly, must agree with the
// mean of sampled returns (within 4 standard errors, as above).
func TestFixedActionValuesMatchSampledReturns(t *testing.T) {
	const gamma, n = 0.99, 50_000
	rng := rand.New(rand.NewPCG(8, 1))
	best, bestValue := BestFixedAction(gamma)
	for _, a := range Actions() {
		exact := Evaluate(Fixed(a), gamma).Start()
		mean, sd := stat.MeanStdDev(sampleReturns(Fixed(a), gamma, n, rng), nil)
		if stderr := sd / math.Sqrt(n); math.Abs(mean-exact) > 4*stderr {
			t.Errorf("always %s: exact %.4f, sampled %.4f ± %.4f (standard error)", a, exact, mean, stderr)
		}
		if exact > bestValue {
			t.Errorf("always %s is worth %.4f, more than the best fixed action %s at %.4f", a, exact, best, bestValue)
		}
	}
	optimal, random := Optimal(gamma).Start(), RandomValue(gamma)
	// No fixed action beats the optimum (it is optimal among all policies).
	if bestValue > optimal {
		t.Errorf("best fixed action %s %.4f above the optimum %.4f", best, bestValue, optimal)
	}
	t.Logf("best fixed action: always %s, %.3f; %.1f%% of the way from random %.3f to optimal %.3f",
		best, bestValue, 100*(bestValue-random)/(optimal-random), random, optimal)
}

// Explore mode's policy: with epsilon 1 everywhere it is the uniformly
// random policy, with epsilon 0 the greedy one; in between its exact value
// must agree with sampled returns, and each state's probabilities follow
// the epsilon-greedy rule, epsilon/|A| for every action and 1 - epsilon
// more for the greedy one (Sutton & Barto, Reinforcement Learning: An
// Introduction, 2nd ed., section 5.4; the 1 - epsilon split evenly over
// tied greedy actions is the service's own rule), and sum to 1.
func TestEpsilonSoftValue(t *testing.T) {
	const gamma, n = 0.99, 100_000
	q := Optimal(gamma).Q
	constant := func(eps float64) func(State) float64 { return func(State) float64 { return eps } }
	if got, want := Evaluate(EpsilonSoft(q, constant(1)), gamma).Start(), RandomValue(gamma); math.Abs(got-want) > 1e-12 {
		t.Errorf("epsilon 1: %.15g, random %.15g", got, want)
	}
	if got, want := Evaluate(EpsilonSoft(q, constant(0)), gamma).Start(), Evaluate(Greedy(q), gamma).Start(); math.Abs(got-want) > 1e-12 {
		t.Errorf("epsilon 0: %.15g, greedy %.15g", got, want)
	}
	byDay := func(s State) float64 { return 0.1 + 0.1*float64(s.Day) }
	policy := EpsilonSoft(q, byDay)
	for _, s := range States() {
		var sum float64
		greedy := Greedy(q)(s)
		ties := 0.0
		for _, g := range greedy {
			if g > 0 {
				ties++
			}
		}
		for a, p := range policy(s) {
			sum += p
			want := byDay(s) / float64(numActions)
			if greedy[a] > 0 {
				want += (1 - byDay(s)) / ties
			}
			if math.Abs(p-want) > 1e-15 {
				t.Fatalf("%s, %s: probability %v, want %v", s, Action(a), p, want)
			}
		}
		if math.Abs(sum-1) > 1e-12 {
			t.Fatalf("%s: probabilities sum to %v", s, sum)
		}
	}
	rng := rand.New(rand.NewPCG(8, 2))
	exact := Evaluate(policy, gamma).Start()
	mean, sd := stat.MeanStdDev(sampleReturns(policy, gamma, n, rng), nil)
	if stderr := sd / math.Sqrt(n); math.Abs(mean-exact) > 4*stderr {
		t.Errorf("epsilon by day: exact %.4f, sampled %.4f ± %.4f (standard error)", exact, mean, stderr)
	}
}
