package cardgame

import (
	"math"
	"math/rand/v2"
	"testing"
)

// The rules written here must reproduce the book's value of the Example 5.4
// state under "stick only on 20 or 21": -0.27726 (Sutton & Barto, 2nd ed.,
// Example 5.4). Playing that policy on-policy from the state 1,000,000
// times gives a mean with a standard error near 0.001 (returns are in
// [-1, 1]); four standard errors is the tolerance.
func TestRulesReproduceTheBooksStateValue(t *testing.T) {
	rng := rand.New(rand.NewPCG(54, 54))
	const n = 1_000_000
	sum, sq := 0.0, 0.0
	for range n {
		steps := PlayFrom(ExampleStart, StickOn20Or21, rng)
		g := steps[len(steps)-1].Reward
		sum += g
		sq += g * g
	}
	mean := sum / n
	se := math.Sqrt((sq/n - mean*mean) / n)
	t.Logf("on-policy mean %.5f (standard error %.5f), book %.5f", mean, se, ExampleStartValue)
	if math.Abs(mean-ExampleStartValue) > 4*se {
		t.Fatalf("on-policy value %.5f is more than 4 standard errors (%.5f) from the book's %.5f", mean, se, ExampleStartValue)
	}
}

func TestDeckAndHands(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 1))
	counts := map[int]int{}
	for range 130_000 {
		counts[Card(rng)]++
	}
	if len(counts) != 10 || counts[10] < 38_000 || counts[10] > 42_000 || counts[1] < 9_000 || counts[1] > 11_000 {
		t.Fatalf("card counts %v: want 1..10 with ten-valued cards four times as likely", counts)
	}
	h := hand{}
	h.add(1)
	h.add(6)
	if v, usable := h.value(); v != 17 || !usable {
		t.Fatalf("ace and six: %d usable=%v, want soft 17", v, usable)
	}
	h.add(9)
	if v, usable := h.value(); v != 16 || usable {
		t.Fatalf("ace, six, nine: %d usable=%v, want hard 16", v, usable)
	}
	// Every step of a game from the example's start is a state of 12 to 21.
	for range 10_000 {
		for _, st := range PlayFrom(ExampleStart, Random(rng), rng) {
			if st.State.Player < 12 || st.State.Player > 21 || st.State.Dealer != 2 {
				t.Fatalf("state %+v out of range", st.State)
			}
		}
	}
}
