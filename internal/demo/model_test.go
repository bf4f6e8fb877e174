package demo

import (
	"math"
	"math/rand/v2"
	"testing"
)

func TestTransitionProbabilitiesSumToOne(t *testing.T) {
	for _, s := range States() {
		for _, a := range Actions() {
			var total float64
			for _, o := range Transitions(s, a) {
				if !(o.Prob > 0 && o.Prob <= 1) {
					t.Errorf("%s, %s: outcome probability %v outside (0, 1]", s, a, o.Prob)
				}
				total += o.Prob
			}
			if math.Abs(total-1) > 1e-12 {
				t.Errorf("%s, %s: probabilities sum to %.17g", s, a, total)
			}
		}
	}
}

func TestStartDistribution(t *testing.T) {
	var total float64
	for _, st := range Starts() {
		total += st.Prob
		if st.State.Day != 0 || st.State.Tries != 0 || st.State.Messages != 0 || st.State.CardUpdated {
			t.Errorf("start state %s is not a fresh failure", st.State)
		}
	}
	if math.Abs(total-1) > 1e-12 {
		t.Errorf("start probabilities sum to %.17g", total)
	}
}

// Every step moves the clock one day and the last day always ends the
// episode, which is what makes the state graph acyclic and episodes at
// most DayCap steps long.
func TestEveryStepAdvancesOneDay(t *testing.T) {
	known := make(map[State]bool)
	for _, s := range States() {
		known[s] = true
	}
	for _, s := range States() {
		if s.Day < 0 || s.Day >= DayCap {
			t.Errorf("state %s outside days 0 to %d", s, DayCap-1)
		}
		for _, a := range Actions() {
			for _, o := range Transitions(s, a) {
				if o.Done {
					continue
				}
				if o.Next.Day != s.Day+1 {
					t.Errorf("%s, %s: next day %d, want %d", s, a, o.Next.Day, s.Day+1)
				}
				if !known[o.Next] {
					t.Errorf("%s, %s: next state %s missing from States", s, a, o.Next)
				}
			}
		}
	}
}

func TestSampledEpisodesEndWithinDayCap(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	for range 20_000 {
		s := SampleStart(rng)
		for steps := 1; ; steps++ {
			if steps > DayCap {
				t.Fatalf("episode from %s still running after %d steps", s, DayCap)
			}
			o := Step(s, Action(rng.IntN(int(numActions))), rng)
			if o.Done {
				break
			}
			s = o.Next
		}
	}
}

// The service learns from the state string alone, so distinct states must
// have distinct strings.
func TestStateStringsAreDistinct(t *testing.T) {
	seen := make(map[string]State)
	for _, s := range States() {
		if other, ok := seen[s.String()]; ok {
			t.Errorf("%+v and %+v share the string %q", s, other, s.String())
		}
		seen[s.String()] = s
	}
	want := "day=3|tries=1|msgs=2|reason=low_balance|plan=premium|card=new"
	s := State{Day: 3, Tries: 1, Messages: 2, Reason: LowBalance, Plan: Premium, CardUpdated: true}
	if got := s.String(); got != want {
		t.Errorf("String() = %q, want %q", got, want)
	}
}

// Backward induction needs every successor before its predecessor.
func TestStatesAreOrderedByDay(t *testing.T) {
	states := States()
	for i := 1; i < len(states); i++ {
		if states[i].Day < states[i-1].Day {
			t.Fatalf("state %d (%s) comes after a later day (%s)", i, states[i], states[i-1])
		}
	}
}

func TestModelSize(t *testing.T) {
	// Small enough to learn from a minute of traffic, large enough that the
	// decisions depend on the whole state.
	n := len(States())
	if n < 100 || n > 500 {
		t.Errorf("%d states, want a few hundred", n)
	}
	if got := len(ActionNames()); got != 6 {
		t.Errorf("%d actions, want 6", got)
	}
}
