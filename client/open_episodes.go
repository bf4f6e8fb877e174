package client

import (
	"context"
	"net/http"
	"time"
)

// An open episode is one qtally keeps for the application: each decision
// is recorded when it is chosen (ChooseRecorded), rewards are added as they
// happen (AddReward), and ending it (EndEpisode) stores it like a posted
// episode, with every decision's probability and allowed set.

// recordedChoose is a choose request that records its decision.
type recordedChoose struct {
	ChooseRequest
	Episode string `json:"episode"`
	Step    int    `json:"step"`
}

// ChooseRecorded is Choose that records the decision as step (from 0) of
// the open episode episode before answering; step 0 opens the episode.
// It is safe to retry: the same step again is answered with the decision
// recorded the first time (Choice.Repeated). Another step than the next is
// refused (409 conflict).
func (c *Client) ChooseRecorded(ctx context.Context, policy, episode string, step int, req ChooseRequest) (Choice, error) {
	var ch Choice
	_, err := c.sendJSON(ctx, http.MethodPost, policyPath(policy, "choose"), true,
		recordedChoose{ChooseRequest: req, Episode: episode, Step: step}, &ch)
	ch.State = req.State
	return ch, err
}

// RewardOptions refine AddReward.
type RewardOptions struct {
	// Step is the decision the reward follows; nil means the latest.
	Step *int
	// Key makes the addition safe to retry: another addition with the same
	// key to the episode adds nothing. Without a key the client retries
	// the addition only after 429 (answered before anything is done), so a
	// lost answer cannot make it count twice.
	Key string
}

// RewardResult is the service's answer to AddReward.
type RewardResult struct {
	// Step is the decision the reward was added to.
	Step int `json:"step"`
	// Reward is that decision's rewards summed, this addition included.
	Reward float64 `json:"reward"`
	// Repeated says the key was used before: nothing was added.
	Repeated bool `json:"repeated"`
}

// AddReward adds reward to a decision of an open episode; several
// additions to one decision sum.
func (c *Client) AddReward(ctx context.Context, policy, episode string, reward float64, opts RewardOptions) (RewardResult, error) {
	in := struct {
		Reward float64 `json:"reward"`
		Step   *int    `json:"step,omitempty"`
		Key    string  `json:"key,omitempty"`
	}{reward, opts.Step, opts.Key}
	var res RewardResult
	_, err := c.sendJSON(ctx, http.MethodPost, policyPath(policy, "open-episodes", episode, "rewards"), opts.Key != "", in, &res)
	return res, err
}

// EndResult is the service's answer to EndEpisode.
type EndResult struct {
	ID    string `json:"id"`
	Steps int    `json:"steps"`
	// Return is the undiscounted sum of the episode's rewards.
	Return float64 `json:"return"`
	// AlreadyEnded says the episode had ended before (a retry): nothing
	// changed.
	AlreadyEnded bool `json:"already_ended"`
}

// EndEpisode ends an open episode, adding finalReward (when not nil) to its
// latest decision: it then enters training like a posted episode, once.
// It is safe to retry: ending it again answers AlreadyEnded.
func (c *Client) EndEpisode(ctx context.Context, policy, episode string, finalReward *float64) (EndResult, error) {
	in := struct {
		Reward *float64 `json:"reward,omitempty"`
	}{finalReward}
	var res EndResult
	_, err := c.sendJSON(ctx, http.MethodPost, policyPath(policy, "open-episodes", episode, "end"), true, in, &res)
	return res, err
}

// OpenEpisode is an episode qtally keeps open, with its recorded decisions.
type OpenEpisode struct {
	ID       string    `json:"id"`
	OpenedAt time.Time `json:"opened_at"`
	// LastActiveAt is the last decision or reward; idleness counts from
	// here.
	LastActiveAt time.Time  `json:"last_active_at"`
	Steps        []OpenStep `json:"steps"`
}

// OpenStep is one recorded decision of an open episode.
type OpenStep struct {
	Step        int       `json:"step"`
	State       string    `json:"state"`
	Action      string    `json:"action"`
	Probability float64   `json:"probability"`
	Allowed     []string  `json:"allowed"`
	Mode        Mode      `json:"mode"`
	Revision    int64     `json:"revision"`
	ChosenAt    time.Time `json:"chosen_at"`
	// Reward is the rewards added to this decision so far, summed.
	Reward float64 `json:"reward"`
}

// OpenEpisode reads an open episode. Once it has ended it is a stored
// episode, and this answers 404 (ProblemNotFound).
func (c *Client) OpenEpisode(ctx context.Context, policy, episode string) (OpenEpisode, error) {
	var ep OpenEpisode
	_, err := c.doJSON(ctx, call{method: http.MethodGet, path: policyPath(policy, "open-episodes", episode), repeatable: true}, &ep)
	return ep, err
}
