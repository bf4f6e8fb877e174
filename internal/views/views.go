package views

import (
	"slices"
	"time"

	"github.com/qtally/qtally/training"
)

// PolicyStatus is a policy with where its data and training stand.
type PolicyStatus struct {
	training.Policy
	Episodes int64 `json:"episodes"`
	// Backlog counts stored episodes not trained yet.
	Backlog         int64      `json:"backlog"`
	OldestUntrained *time.Time `json:"oldest_untrained,omitempty"`
	States          int64      `json:"states"`
	Pairs           int64      `json:"pairs"`
	// LastTrainedAt is when the last training batch committed.
	LastTrainedAt *time.Time `json:"last_trained_at,omitempty"`
}

// ActionValue is one action's estimate in a state.
type ActionValue struct {
	Action    string     `json:"action"`
	Q         float64    `json:"q"`
	Visits    int64      `json:"visits"`
	LastDelta float64    `json:"last_delta"`
	UpdatedAt *time.Time `json:"updated_at,omitempty"`
}

// StateView is everything known of one state.
type StateView struct {
	State string `json:"state"`
	// Known is false for a state no episode has trained yet.
	Known        bool          `json:"known"`
	Visits       int64         `json:"visits"`
	Actions      []ActionValue `json:"actions"`
	GreedyAction string        `json:"greedy_action"`
}

// NewStateView fills in the actions the table lacks with the initial value
// and names the action greedy mode answers with every action allowed (the
// first of any tie, so that reading is deterministic; choosing splits ties
// at random), "" when it has none.
func NewStateView(p training.Policy, state string, stored map[int16]ActionValue) StateView {
	v := StateView{State: state, Known: len(stored) > 0, Actions: make([]ActionValue, len(p.Actions))}
	q, visits := make([]float64, len(p.Actions)), make([]int64, len(p.Actions))
	for i, name := range p.Actions {
		av, ok := stored[int16(i)]
		if !ok {
			av = ActionValue{Q: p.InitialQ}
		}
		av.Action = name
		v.Actions[i] = av
		v.Visits += av.Visits
		q[i], visits[i] = av.Q, av.Visits
	}
	g := p.GreedyRule().Find(q, visits, slices.Index(p.Actions, p.GreedyFallback), training.Greedy)
	if g.Size > 0 {
		v.GreedyAction = p.Actions[g.First(q, visits)]
	}
	return v
}

// IngestResult says what became of a posted batch.
type IngestResult struct {
	Accepted   int `json:"accepted"`
	Duplicates int `json:"duplicates"`
}

// Backlog is how much of a policy's stored data awaits training.
type Backlog struct {
	Policy         string
	Episodes       int64
	OldestReceived *time.Time
}
