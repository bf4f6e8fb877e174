// Package cardgame plays the card game of Sutton & Barto, Reinforcement
// Learning: An Introduction, 2nd ed., Example 5.1, so that tests can check
// off-policy evaluation against the book's published figures (Example 5.4,
// Figure 5.3). Only tests use it.
//
// The rules, as the book states them: cards are drawn from an infinite deck
// (with replacement); face cards count 10 and an ace 1 or 11. Player and
// dealer each start with two cards, one of the dealer's face up. A player
// whose first two cards make 21 (a natural) wins unless the dealer also has
// one, which is a draw. Otherwise the player hits (draws a card) until
// sticking or going over 21 (going bust, a loss). Then the dealer hits
// until reaching 17 or more, and sticks. A dealer who goes bust loses;
// otherwise the sum closer to 21 wins. Rewards are +1 for a win, -1 for a
// loss and 0 for a draw, all at the end; there is no discount. An ace the
// player can count as 11 without going bust is "usable" and is counted so.
package cardgame

import (
	"fmt"
	"math/rand/v2"
)

// State is what the player sees: the current sum, whether it holds a
// usable ace, and the dealer's face-up card (1 for an ace).
type State struct {
	Player    int
	UsableAce bool
	Dealer    int
}

// Key names the state for the service.
func (s State) Key() string {
	ace := "no"
	if s.UsableAce {
		ace = "yes"
	}
	return fmt.Sprintf("player=%d ace=%s dealer=%d", s.Player, ace, s.Dealer)
}

// Actions, in the order the tests give them to the service.
const (
	Stick = "stick"
	Hit   = "hit"
)

// Actions are the game's actions.
var Actions = []string{Stick, Hit}

// Step is one decision and the reward that followed it.
type Step struct {
	State  State
	Action string
	Reward float64
}

// ExampleStart is the state of Example 5.4: the player's sum is 13 with a
// usable ace (an ace and a deuce), the dealer shows a deuce.
var ExampleStart = State{Player: 13, UsableAce: true, Dealer: 2}

// ExampleStartValue is the value of ExampleStart under StickOn20Or21, as the
// book gives it for Example 5.4 (from averaging 100 million episodes).
const ExampleStartValue = -0.27726

// StickOn20Or21 is the target policy of Example 5.4: stick only on 20 or 21.
func StickOn20Or21(s State) string {
	if s.Player >= 20 {
		return Stick
	}
	return Hit
}

// Card draws from the infinite deck: ace (1) to 9 one in 13 each, and the
// ten-valued cards (ten, jack, queen, king) four in 13.
func Card(rng *rand.Rand) int {
	return min(1+rng.IntN(13), 10)
}

// hand is a sum counting aces as 1, and whether it holds an ace.
type hand struct {
	sum    int
	hasAce bool
}

func (h *hand) add(card int) {
	h.sum += card
	h.hasAce = h.hasAce || card == 1
}

// value counts one ace as 11 when that does not go over 21.
func (h hand) value() (int, bool) {
	if h.hasAce && h.sum+10 <= 21 {
		return h.sum + 10, true
	}
	return h.sum, false
}

// PlayFrom plays one game from a player's two-card state against a dealer
// showing start.Dealer, choosing with policy, and returns its steps.
func PlayFrom(start State, policy func(State) string, rng *rand.Rand) []Step {
	// The player's hand as a hand: a usable ace is an ace counted as 1 here.
	player := hand{sum: start.Player, hasAce: start.UsableAce}
	if start.UsableAce {
		player.sum -= 10
	}
	dealer := hand{}
	dealer.add(start.Dealer)
	dealer.add(Card(rng))

	playerNatural := start.Player == 21 && start.UsableAce
	dealerValue, _ := dealer.value()
	if playerNatural {
		reward := 1.0
		if dealerValue == 21 {
			reward = 0
		}
		return []Step{{State: start, Action: Stick, Reward: reward}}
	}

	var steps []Step
	for {
		sum, usable := player.value()
		s := State{Player: sum, UsableAce: usable, Dealer: start.Dealer}
		a := policy(s)
		steps = append(steps, Step{State: s, Action: a})
		if a == Stick {
			break
		}
		player.add(Card(rng))
		if v, _ := player.value(); v > 21 {
			steps[len(steps)-1].Reward = -1
			return steps
		}
	}
	for {
		v, _ := dealer.value()
		if v >= 17 {
			break
		}
		dealer.add(Card(rng))
	}
	playerValue, _ := player.value()
	dealerValue, _ = dealer.value()
	var reward float64
	switch {
	case dealerValue > 21 || playerValue > dealerValue:
		reward = 1
	case playerValue < dealerValue:
		reward = -1
	}
	steps[len(steps)-1].Reward = reward
	return steps
}

// Random is the behaviour policy of Example 5.4: hit or stick with equal
// probability (BehaviourProbability).
func Random(rng *rand.Rand) func(State) string {
	return func(State) string {
		return Actions[rng.IntN(2)]
	}
}

// BehaviourProbability is the chance Random gives either action.
const BehaviourProbability = 0.5
