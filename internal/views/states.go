package views

import (
	"math"
	"time"

	"github.com/qtally/qtally/training"
)

// StateOrder is how a listing of states is sorted.
type StateOrder string

// Every order is descending, ties broken by state name (bytewise,
// ascending), so that a listing pages deterministically.
const (
	// ByVisits puts the states visited most first.
	ByVisits StateOrder = "visits"
	// ByDrift puts first the states whose latest update moved an estimate
	// most (largest |last delta| over their actions).
	ByDrift StateOrder = "drift"
	// ByUpdated puts the states updated most recently first.
	ByUpdated StateOrder = "updated"
)

// StateOrders lists every order, for validation and messages.
var StateOrders = []StateOrder{ByVisits, ByDrift, ByUpdated}

// Page sizes of state listings.
const (
	DefaultStatePage = 50
	MaxStatePage     = 1000
)

// StateKey is where a listing stands: the sort key of the last state
// returned. Only the field of its order matters.
type StateKey struct {
	Order   StateOrder
	Visits  int64
	Drift   float64
	Updated time.Time
	State   string
}

// StateQuery asks for one page of a policy's states.
type StateQuery struct {
	Order StateOrder
	Limit int
	// After continues a listing after this key; nil starts it.
	After *StateKey
}

// StateSummary is one state as listings show it.
type StateSummary struct {
	StateView
	// Drift is the largest |last delta| over the state's actions.
	Drift     float64   `json:"drift"`
	UpdatedAt time.Time `json:"updated_at"`
	// GreedyGap is how far the greedy action's Q is above the best other
	// action's; 0 means a tie.
	GreedyGap float64 `json:"greedy_gap"`
}

// NewStateSummary describes a stored state for listings.
func NewStateSummary(p training.Policy, state string, stored map[int16]ActionValue, drift float64, updated time.Time) StateSummary {
	v := NewStateView(p, state, stored)
	return StateSummary{StateView: v, Drift: drift, UpdatedAt: updated, GreedyGap: greedyGap(v)}
}

// Key is the summary's place in a listing of the given order.
func (s StateSummary) Key(order StateOrder) StateKey {
	return StateKey{Order: order, Visits: s.Visits, Drift: s.Drift, Updated: s.UpdatedAt, State: s.State}
}

func greedyGap(v StateView) float64 {
	best, runnerUp := math.Inf(-1), math.Inf(-1)
	for _, a := range v.Actions {
		switch {
		case a.Q > best:
			best, runnerUp = a.Q, best
		case a.Q > runnerUp:
			runnerUp = a.Q
		}
	}
	if math.IsInf(runnerUp, -1) {
		return 0
	}
	return best - runnerUp
}

// StatePage is one page of a listing.
type StatePage struct {
	States []StateSummary
	// Next continues the listing; nil on its last page.
	Next *StateKey
}
