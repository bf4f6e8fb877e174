package client

import (
	"context"
	"encoding/json"
	"net/http"
	"net/url"
	"strconv"
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
// policy PUT). The learning fields up to InitialQ are always sent: start
// from DefaultSettings, which holds the service's defaults, and change what
// you need. The fields after them are left out at their zero value, which
// gives the service's default.
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
	// MaxStates is the most states the policy accepts; a batch bringing
	// new states beyond it is refused (409 quota-exceeded). 0 leaves it
	// out: the service's default for a new policy, the current value for
	// an existing one.
	MaxStates int64 `json:"max_states,omitempty"`
	// ReturnTarget is a mean return to aim for, drawn beside the learning
	// curve on the status page; it changes nothing in learning.
	ReturnTarget *ReturnTarget `json:"return_target,omitempty"`
	// GreedyMinVisits is how often an action must have been tried in a
	// state before greedy may answer it there.
	GreedyMinVisits int64 `json:"greedy_min_visits,omitempty"`
	// GreedyUntried lets actions never tried in a state be greedy there at
	// InitialQ (an optimistic start needs it). When false, greedy answers
	// 409 no-greedy-answer in a state where no allowed action was tried
	// enough, unless GreedyFallback is set.
	GreedyUntried bool `json:"greedy_untried,omitempty"`
	// GreedyFallback is the action greedy answers where no allowed action
	// was tried enough (the Choice then has Fallback set).
	GreedyFallback string `json:"greedy_fallback,omitempty"`
	// StateShape, when set, is the form every state must have.
	StateShape *StateShape `json:"state_shape,omitempty"`
	// RequireProbability refuses steps without a probability.
	RequireProbability bool `json:"require_probability,omitempty"`
}

// ReturnTarget is a known mean return, such as an exact optimum.
type ReturnTarget struct {
	// Value is the mean discounted return per episode.
	Value float64 `json:"value"`
	// Label says what the value is, such as "exact optimum".
	Label string `json:"label,omitempty"`
}

// StateShape is the form of a policy's states: its fields in order, each
// as name=value, joined by Separator, such as "day=3|reason=low_balance".
type StateShape struct {
	// Separator joins the fields; empty means "|".
	Separator string       `json:"separator,omitempty"`
	Fields    []StateField `json:"fields"`
}

// StateField is one field of a StateShape: one of Values, or an integer
// from Min to Max.
type StateField struct {
	Name   string   `json:"name"`
	Values []string `json:"values,omitempty"`
	Min    *int64   `json:"min,omitempty"`
	Max    *int64   `json:"max,omitempty"`
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
	// ETag identifies the settings as read (from the answer's header):
	// pass it as ifMatch to PutPolicy or PatchPolicy to change them only
	// if nobody changed them since.
	ETag string `json:"-"`
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

// IfMatchAny as ifMatch replaces a policy's settings whatever they are.
const IfMatchAny = "*"

// PutPolicy creates a policy or replaces all its settings (a field left
// out takes its default); created says which. Creating needs no ifMatch
// (""). Replacing needs one: the ETag of the settings as last read (an
// *Error with ProblemPreconditionFailed when they changed since), or
// IfMatchAny; without it the answer is an *Error with
// ProblemPreconditionRequired. The returned Policy carries the new ETag.
func (c *Client) PutPolicy(ctx context.Context, name string, s Settings, ifMatch string) (p Policy, created bool, err error) {
	body, err := jsonBody(s)
	if err != nil {
		return Policy{}, false, err
	}
	// Only a replace of whatever is there ends the same when a lost answer
	// makes the client send it again: a second create, or a second
	// replace of a given ETag, would be refused.
	resp, err := c.do(ctx, call{method: http.MethodPut, path: policyPath(name), contentType: "application/json",
		ifMatch: ifMatch, body: body, repeatable: ifMatch == IfMatchAny})
	if err != nil {
		return Policy{}, false, err
	}
	defer resp.Body.Close()
	if err := decodeAnswer(resp, &p); err != nil {
		return Policy{}, false, err
	}
	p.ETag = resp.Header.Get("ETag")
	return p, resp.StatusCode == http.StatusCreated, nil
}

// PatchPolicy changes the settings a JSON merge patch names (RFC 7396):
// patch is any value that encodes as a JSON object, such as
// map[string]any{"epsilon": 0.05} or a json.RawMessage; a null gives a
// setting its default again, and the others keep their values. ifMatch ""
// patches whatever is there; an ETag patches only settings unchanged since
// they were read (an *Error with ProblemPreconditionFailed otherwise). The
// returned Policy carries the new ETag.
func (c *Client) PatchPolicy(ctx context.Context, name string, patch any, ifMatch string) (Policy, error) {
	body, err := jsonBody(patch)
	if err != nil {
		return Policy{}, err
	}
	resp, err := c.do(ctx, call{method: http.MethodPatch, path: policyPath(name), contentType: "application/merge-patch+json",
		ifMatch: ifMatch, body: body, repeatable: ifMatch == ""})
	if err != nil {
		return Policy{}, err
	}
	defer resp.Body.Close()
	var p Policy
	if err := decodeAnswer(resp, &p); err != nil {
		return Policy{}, err
	}
	p.ETag = resp.Header.Get("ETag")
	return p, nil
}

// Policy reads a policy's settings, with their ETag, and its training
// status.
func (c *Client) Policy(ctx context.Context, name string) (PolicyStatus, error) {
	var st PolicyStatus
	header, err := c.doJSON(ctx, call{method: http.MethodGet, path: policyPath(name), repeatable: true}, &st)
	if err == nil {
		st.ETag = header.Get("ETag")
	}
	return st, err
}

// DeletePolicy deletes a policy with everything stored for it: settings
// and their history, episodes, Q table, snapshots, jobs and training
// history. The name can then be used for a new policy.
func (c *Client) DeletePolicy(ctx context.Context, name string) error {
	_, err := c.doJSON(ctx, call{method: http.MethodDelete, path: policyPath(name), repeatable: true}, nil)
	return err
}

// EraseEpisode deletes the stored steps of one episode. Learned values
// keep what it taught; an episode not trained yet is never trained. The id
// may be posted again afterwards.
func (c *Client) EraseEpisode(ctx context.Context, policy, id string) error {
	_, err := c.doJSON(ctx, call{method: http.MethodDelete, path: policyPath(policy, "episodes", id), repeatable: true}, nil)
	return err
}

// SettingDiff is one setting a change touched, with its JSON values before
// and after (null when unset, and before a create).
type SettingDiff struct {
	Field string          `json:"field"`
	Old   json.RawMessage `json:"old"`
	New   json.RawMessage `json:"new"`
}

// SettingsChange is one entry of a policy's settings history.
type SettingsChange struct {
	ID        int64     `json:"id"`
	ChangedAt time.Time `json:"changed_at"`
	// Kind is "create", "replace" (a PUT) or "patch".
	Kind string `json:"kind"`
	// TokenID is the token that made the change; nil when none did.
	TokenID    *int64        `json:"token_id"`
	TokenLabel string        `json:"token_label,omitempty"`
	Fields     []SettingDiff `json:"fields"`
}

// SettingsHistory is a page of a policy's settings changes, newest first.
type SettingsHistory struct {
	Changes []SettingsChange `json:"changes"`
	// NextCursor reads the next (older) page; empty on the last.
	NextCursor string `json:"next_cursor,omitempty"`
}

// SettingsHistory reads a page of a policy's settings changes; cursor ""
// reads the newest, limit 0 takes the service's default page size.
func (c *Client) SettingsHistory(ctx context.Context, policy, cursor string, limit int) (SettingsHistory, error) {
	q := url.Values{}
	if cursor != "" {
		q.Set("cursor", cursor)
	}
	if limit > 0 {
		q.Set("limit", strconv.Itoa(limit))
	}
	var h SettingsHistory
	_, err := c.doJSON(ctx, call{method: http.MethodGet, path: policyPath(policy, "settings-history"), query: q, repeatable: true}, &h)
	return h, err
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
	// Mode is Explore or Greedy; empty means Greedy. Greedy answers an
	// *Error with ProblemNoGreedyAnswer (409) in a state where no allowed
	// action was tried enough, unless the policy has a GreedyFallback or
	// GreedyUntried.
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
	// Visits is how often Action was tried in the state: the visits
	// behind its estimate.
	Visits int64 `json:"visits"`
	// Fallback says Action is the policy's GreedyFallback, standing in
	// where no allowed action was tried enough.
	Fallback bool `json:"fallback"`
	// Revision is the training revision of the copy that answered.
	Revision int64 `json:"revision"`
	// CopyAgeSeconds is the time since the answering process last
	// confirmed its copy current.
	CopyAgeSeconds float64 `json:"copy_age_seconds"`
	// Episode and Step say where ChooseRecorded recorded the decision
	// (empty and 0 for Choose).
	Episode string `json:"episode,omitempty"`
	Step    int    `json:"step,omitempty"`
	// Repeated says the step was recorded before: this is that decision,
	// and nothing new was recorded.
	Repeated bool `json:"repeated,omitempty"`
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
