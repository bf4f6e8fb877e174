package views

import (
	"math"
	"testing"
	"time"

	"github.com/qtally/qtally/training"
)

func TestGreedyGapIsTheLeadOverTheRunnerUp(t *testing.T) {
	p := training.Policy{Settings: training.Settings{Actions: []string{"a", "b", "c"}, InitialQ: 0.5}}
	at := time.Now()
	for _, c := range []struct {
		stored map[int16]ActionValue
		greedy string
		gap    float64
	}{
		{map[int16]ActionValue{0: {Q: 1, Visits: 1}, 1: {Q: 3, Visits: 1}, 2: {Q: 2, Visits: 1}}, "b", 1},
		{map[int16]ActionValue{0: {Q: 3, Visits: 1}, 1: {Q: 3, Visits: 1}, 2: {Q: 1, Visits: 1}}, "a", 0},
		// Actions never tried count at the initial value in the gap, but are
		// never greedy unless the policy says so, as choosing does.
		{map[int16]ActionValue{2: {Q: 2, Visits: 1}}, "c", 1.5},
		{map[int16]ActionValue{1: {Q: -1, Visits: 1}}, "b", 0},
	} {
		s := NewStateSummary(p, "s", c.stored, 0, at)
		if s.GreedyAction != c.greedy || math.Abs(s.GreedyGap-c.gap) > 1e-15 {
			t.Fatalf("%v: greedy %s gap %v; want %s and %v", c.stored, s.GreedyAction, s.GreedyGap, c.greedy, c.gap)
		}
	}
}
