package client

import (
	"context"
	"net/http"
	"time"
)

// Mode is how choose picks: Explore (epsilon-soft) or Greedy.
type Mode string

// Choosing modes.
const (
	Explore Mode = "explore"
	Greedy  Mode = "greedy"
)

// Settings are a policy's actions and learning settings (the body of a
// policy PUT). Every field is sent: start from DefaultSettings, which holds
// the service's defaults, and change what you need.
type Settings struct {
	// Actions, in a fixed order; they cannot change once episodes are stored.
	Actions []string `json:"actions"`
	// Gamma discounts later rewards.
	Gamma float64 `json:"gamma"`
	// Alpha is the constant step size.
	Alpha float64 `json:"alpha"`
	// Epsilon is explore mode's exploration rate; with EpsilonDecayVisits
	// k > 0 a state's rate is max(EpsilonMin, Epsilon k / (k + visits)).
	Epsilon            float64 `json:"epsilon"`
	EpsilonMin         float64 `json:"epsilon_min"`
	EpsilonDecayVisits float64 `json:"epsilon_decay_visits"`
	// Visit is "first" or "every": which occurrences of a pair in an
	// episode update it.
	Visit string `json:"visit,omitempty"`
	// InitialQ is the value of pairs never updated.
	InitialQ float64 `json:"initial_q"`
}

// DefaultSettings are the service's defaults for the given actions.
func DefaultSettings(actions ...string) Settings {
	return Settings{Actions: actions, Gamma: 1, Alpha: 0.1, Epsilon: 0.1, Visit: "first"}
}

// Policy is a policy as stored.
type Policy struct {
	Name string `json:"name"`
	Settings
	// Revision counts committed training batches and table changes.
	Revision  int64     `json:"revision"`
	CreatedAt time.Time `json:"created_at"`
	UpdatedAt time.Time `json:"updated_at"`
}

// PolicyStatus is a policy with where its training stands.
type PolicyStatus struct {
	Policy
	Episodes int64 `json:"episodes"`
	// Backlog is the stored episodes not trained yet.
	Backlog         int64     `json:"backlog"`
	OldestUntrained time.Time `json:"oldest_untrained,omitzero"`
	States          int64     `json:"states"`
	Pairs           int64     `json:"pairs"`
	LastTrainedAt   time.Time `json:"last_trained_at,omitzero"`
}

// PutPolicy creates a policy or changes its settings; created says which.
func (c *Client) PutPolicy(ctx context.Context, name string, s Settings) (p Policy, created bool, err error) {
	body, err := jsonBody(s)
	if err != nil {
		return Policy{}, false, err
	}
	resp, err := c.do(ctx, call{method: http.MethodPut, path: policyPath(name), contentType: "application/json", body: body, repeatable: true})
	if err != nil {
		return Policy{}, false, err
	}
	defer resp.Body.Close()
	if err := decodeAnswer(resp, &p); err != nil {
		return Policy{}, false, err
	}
	return p, resp.StatusCode == http.StatusCreated, nil
}

// Policy reads a policy's settings and training status.
func (c *Client) Policy(ctx context.Context, name string) (PolicyStatus, error) {
	var st PolicyStatus
	_, err := c.doJSON(ctx, call{method: http.MethodGet, path: policyPath(name), repeatable: true}, &st)
	return st, err
}

// WaitTrained polls a policy's status until its backlog is empty (the
// worker has trained every stored episode) or ctx ends, and returns the
// last status read.
func (c *Client) WaitTrained(ctx context.Context, name string) (PolicyStatus, error) {
	for {
		st, err := c.Policy(ctx, name)
		if err != nil || st.Backlog == 0 {
			return st, err
		}
		if err := sleep(ctx, c.opts.PollInterval); err != nil {
			return st, err
		}
	}
}

// ChooseRequest asks for an action in a state.
type ChooseRequest struct {
	State string `json:"state"`
	// Mode is Explore or Greedy; empty means Greedy.
	Mode Mode `json:"mode,omitempty"`
	// Allowed masks actions out: only these may be chosen; nil allows all.
	Allowed []string `json:"allowed,omitempty"`
}

// Choice is the service's answer to choose. Fields the service adds later
// are ignored.
type Choice struct {
	// State is the state the choice was made in (from the request; the
	// answer does not repeat it).
	State  string `json:"-"`
	Action string `json:"action"`
	// Probability is the chance the rule gave Action: log it with the step.
	Probability float64 `json:"probability"`
	// Explored says Action is not a greedy one.
	Explored     bool   `json:"explored"`
	GreedyAction string `json:"greedy_action"`
	KnownState   bool   `json:"known_state"`
	// Allowed is the set Action was chosen from: the request's, or every
	// action. Log it with the step, beside Probability.
	Allowed []string `json:"allowed"`
	// Revision is the training revision of the copy that answered.
	Revision int64 `json:"revision"`
	// CopyAgeSeconds is the time since the answering process last
	// confirmed its copy current.
	CopyAgeSeconds float64 `json:"copy_age_seconds"`
}

// Choose asks which action to take. Record the answer with a Recorder (or
// post Probability and Allowed with the step) so that the decision can be
// evaluated off-policy later.
func (c *Client) Choose(ctx context.Context, policy string, req ChooseRequest) (Choice, error) {
	var ch Choice
	_, err := c.sendJSON(ctx, http.MethodPost, policyPath(policy, "choose"), true, req, &ch)
	ch.State = req.State
	return ch, err
}

// ActionValue is one action's estimate in a state.
type ActionValue struct {
	Action    string    `json:"action"`
	Q         float64   `json:"q"`
	Visits    int64     `json:"visits"`
	LastDelta float64   `json:"last_delta"`
	UpdatedAt time.Time `json:"updated_at,omitzero"`
}

// StateView is what the service knows of one state.
type StateView struct {
	State        string        `json:"state"`
	Known        bool          `json:"known"`
	Visits       int64         `json:"visits"`
	Actions      []ActionValue `json:"actions"`
	GreedyAction string        `json:"greedy_action"`
}

// State reads the estimates of every action in a state.
func (c *Client) State(ctx context.Context, policy, state string) (StateView, error) {
	var v StateView
	_, err := c.doJSON(ctx, call{method: http.MethodGet, path: policyPath(policy, "states", state), repeatable: true}, &v)
	return v, err
}
