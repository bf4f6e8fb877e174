// Package demo is a worked scenario for qtally: simulated customers whose
// renewal payment failed, a client that drives them through the HTTP API,
// and an exact solver that says how good the learned policy is.
//
// The scenario is subscription payment recovery. Every day after a failed
// renewal the application picks one action; the customer may pay, cancel,
// update their card or do nothing. All dynamics and numbers here are
// invented for the demo: plausible, but not calibrated on real data.
package demo

import (
	"fmt"
	"math/rand/v2"
	"slices"
)

// DayCap is the number of decision days. Every action moves the clock one
// day forward, and reaching DayCap forces a write-off, so no episode is
// longer than DayCap steps and the state graph has no cycles.
const DayCap = 5

// Caps on the counters kept in the state: beyond them the dynamics no
// longer change, so counting further would only grow the state space.
const (
	maxTries    = 2
	maxMessages = 2
)

// Action is what the application does on one day.
type Action int

const (
	RetryCard Action = iota
	Wait
	EmailReminder
	TextReminder
	OfferDiscount
	WriteOff
	numActions
)

var actionNames = [numActions]string{"retry_card", "wait", "email_reminder", "text_reminder", "offer_discount", "write_off"}

func (a Action) String() string { return actionNames[a] }

// Actions lists every action in the order that probability vectors and
// Q rows use.
func Actions() []Action {
	actions := make([]Action, numActions)
	for a := range actions {
		actions[a] = Action(a)
	}
	return actions
}

// ActionNames is Actions as the strings registered with the service.
func ActionNames() []string { return slices.Clone(actionNames[:]) }

// Reason is the decline reason class of the failed renewal.
type Reason int

const (
	LowBalance Reason = iota
	CardOutOfDate
	BankRefused
	numReasons
)

var reasonNames = [numReasons]string{"low_balance", "card_out_of_date", "bank_refused"}

func (r Reason) String() string { return reasonNames[r] }

// Plan is the customer's subscription tier.
type Plan int

const (
	Basic Plan = iota
	Premium
	numPlans
)

var planNames = [numPlans]string{"basic", "premium"}

func (p Plan) String() string { return planNames[p] }

// State is everything the next day depends on, so the process is Markov
// in State and therefore in its string form.
type State struct {
	Day      int // days since the failed renewal, 0 to DayCap-1
	Tries    int // card retries so far, capped at maxTries
	Messages int // reminders and offers sent so far, capped at maxMessages
	Reason   Reason
	Plan     Plan
	// CardUpdated: the customer has entered new payment details since the
	// failure, which the application learns from its payment processor.
	CardUpdated bool
}

// String is the state as the service sees it, for example
// "day=3|tries=1|msgs=2|reason=low_balance|plan=premium|card=old".
func (s State) String() string {
	card := "old"
	if s.CardUpdated {
		card = "new"
	}
	return fmt.Sprintf("day=%d|tries=%d|msgs=%d|reason=%s|plan=%s|card=%s",
		s.Day, s.Tries, s.Messages, s.Reason, s.Plan, card)
}

// Outcome is one possible result of taking an action in a state. Next is
// meaningful only when Done is false.
type Outcome struct {
	Prob   float64
	Next   State
	Reward float64
	Done   bool
}

// Start is one possible first state of an episode with its probability.
type Start struct {
	Prob  float64
	State State
}

// Mix of failures the application sees on day 0.
var (
	reasonShare = [numReasons]float64{LowBalance: 0.5, CardOutOfDate: 0.2, BankRefused: 0.3}
	planShare   = [numPlans]float64{Basic: 0.7, Premium: 0.3}
)

// Starts is the distribution of first states: day 0, nothing tried yet.
func Starts() []Start {
	var starts []Start
	for r := range numReasons {
		for p := range numPlans {
			starts = append(starts, Start{
				Prob:  reasonShare[r] * planShare[p],
				State: State{Reason: r, Plan: p},
			})
		}
	}
	return starts
}

// Money. A write-off forgives this month's payment and keeps the customer,
// so it is worth 0; a cancellation loses the customer, which costs a few
// months of revenue.
var (
	monthlyPrice = [numPlans]float64{Basic: 10, Premium: 20}
	churnPenalty = [numPlans]float64{Basic: 15, Premium: 30}
	actionCost   = [numActions]float64{
		RetryCard:     0.05, // gateway fee per attempt
		EmailReminder: 0.02,
		TextReminder:  0.10,
		OfferDiscount: 0.02, // sent by email; the discount itself is given up on payment
	}
)

// discountRate is the share of the price given up when a customer pays
// through a discount offer.
const discountRate = 0.25

// lowBalanceRetrySuccessByDay: with a low balance a retry rarely works at once
// and works more often after a few days, as paydays arrive.
var lowBalanceRetrySuccessByDay = [DayCap]float64{0.05, 0.15, 0.30, 0.45, 0.50}

// retryDecay: each failed retry makes the issuer less willing to approve
// the next one.
var retryDecay = [maxTries + 1]float64{1, 0.7, 0.5}

const (
	outOfDateRetrySuccess = 0.03 // only when the bank has already passed on the new card's details
	refusedRetrySuccess   = 0.30
	updatedRetrySuccess   = 0.90 // new payment details almost always work
)

// Chance a reminder makes the customer update their payment details. Texts
// are read more than emails; the owner of an out-of-date card has the most
// reason to act.
var (
	emailUpdate = [numReasons]float64{LowBalance: 0.05, CardOutOfDate: 0.35, BankRefused: 0.20}
	textUpdate  = [numReasons]float64{LowBalance: 0.08, CardOutOfDate: 0.50, BankRefused: 0.30}
)

// Chance a customer pays at once through a discount offer; a hesitant
// customer, one who has already ignored reminders, responds more.
var discountPay = [numReasons]float64{LowBalance: 0.04, CardOutOfDate: 0.06, BankRefused: 0.05}

const (
	hesitantAfterMessages = 2
	hesitantDiscountBoost = 4.0
)

// Cancellation. A customer whose service is suspended may cancel on any
// day; each message adds to that, more so the more messages came before.
// A discount offer annoys less than a plain reminder. Premium customers
// are more invested and cancel less.
const dailyCancel = 0.01

var (
	emailCancel    = [maxMessages + 1]float64{0.01, 0.03, 0.08}
	textCancel     = [maxMessages + 1]float64{0.02, 0.05, 0.12}
	discountCancel = [maxMessages + 1]float64{0.005, 0.015, 0.04}
	planCancel     = [numPlans]float64{Basic: 1, Premium: 0.7}
)

// Transitions lists every outcome of taking action a in state s, with
// probabilities summing to 1. The simulator samples from this list and the
// solver sums over it, so the two always agree.
//
// Order of events within a day: the action may bring the payment in; if
// not, the customer may cancel; if not, a reminder may get the card
// updated, and the day ends.
func Transitions(s State, a Action) []Outcome {
	if a == WriteOff {
		return []Outcome{{Prob: 1, Done: true}}
	}
	cost := actionCost[a]
	var outcomes []Outcome

	pay := payProbability(s, a)
	if pay > 0 {
		received := monthlyPrice[s.Plan]
		if a == OfferDiscount {
			received *= 1 - discountRate
		}
		outcomes = append(outcomes, Outcome{Prob: pay, Reward: received - cost, Done: true})
	}
	unpaid := 1 - pay

	cancel := cancelProbability(s, a)
	outcomes = append(outcomes, Outcome{Prob: unpaid * cancel, Reward: -cost - churnPenalty[s.Plan], Done: true})
	stays := unpaid * (1 - cancel)

	next := s
	next.Day++
	switch a {
	case RetryCard:
		next.Tries = min(next.Tries+1, maxTries)
	case EmailReminder, TextReminder, OfferDiscount:
		next.Messages = min(next.Messages+1, maxMessages)
	}
	if next.Day == DayCap {
		// Forced write-off: worth 0 beyond today's cost, like WriteOff.
		return append(outcomes, Outcome{Prob: stays, Reward: -cost, Done: true})
	}

	update := updateProbability(s, a)
	if update > 0 {
		updated := next
		updated.CardUpdated = true
		outcomes = append(outcomes, Outcome{Prob: stays * update, Next: updated, Reward: -cost})
	}
	return append(outcomes, Outcome{Prob: stays * (1 - update), Next: next, Reward: -cost})
}

func payProbability(s State, a Action) float64 {
	switch a {
	case RetryCard:
		if s.CardUpdated {
			return updatedRetrySuccess
		}
		var base float64
		switch s.Reason {
		case LowBalance:
			base = lowBalanceRetrySuccessByDay[s.Day]
		case CardOutOfDate:
			base = outOfDateRetrySuccess
		case BankRefused:
			base = refusedRetrySuccess
		}
		return base * retryDecay[s.Tries]
	case OfferDiscount:
		p := discountPay[s.Reason]
		if s.Messages >= hesitantAfterMessages {
			p *= hesitantDiscountBoost
		}
		return p
	}
	return 0
}

func cancelProbability(s State, a Action) float64 {
	p := dailyCancel
	switch a {
	case EmailReminder:
		p += emailCancel[s.Messages]
	case TextReminder:
		p += textCancel[s.Messages]
	case OfferDiscount:
		p += discountCancel[s.Messages]
	}
	return p * planCancel[s.Plan]
}

func updateProbability(s State, a Action) float64 {
	if s.CardUpdated {
		return 0
	}
	switch a {
	case EmailReminder:
		return emailUpdate[s.Reason]
	case TextReminder:
		return textUpdate[s.Reason]
	}
	return 0
}

// States lists every state reachable from a start state under some
// sequence of actions, ordered by day (earliest first), so that walking the
// list backwards visits every state after all of its successors.
func States() []State {
	seen := make(map[State]bool)
	var states []State
	frontier := make([]State, 0, len(Starts()))
	for _, st := range Starts() {
		if !seen[st.State] {
			seen[st.State] = true
			frontier = append(frontier, st.State)
		}
	}
	// Every transition adds exactly one day, so breadth-first layers are days.
	for len(frontier) > 0 {
		states = append(states, frontier...)
		var next []State
		for _, s := range frontier {
			for _, a := range Actions() {
				for _, o := range Transitions(s, a) {
					if !o.Done && !seen[o.Next] {
						seen[o.Next] = true
						next = append(next, o.Next)
					}
				}
			}
		}
		frontier = next
	}
	return states
}

// SampleStart draws a first state from Starts.
func SampleStart(rng *rand.Rand) State {
	starts := Starts()
	u := rng.Float64()
	for _, st := range starts {
		if u < st.Prob {
			return st.State
		}
		u -= st.Prob
	}
	// Only rounding in the running subtraction can get here.
	return starts[len(starts)-1].State
}

// Step draws one outcome of taking action a in state s.
func Step(s State, a Action, rng *rand.Rand) Outcome {
	outcomes := Transitions(s, a)
	u := rng.Float64()
	for _, o := range outcomes {
		if u < o.Prob {
			return o
		}
		u -= o.Prob
	}
	return outcomes[len(outcomes)-1]
}
