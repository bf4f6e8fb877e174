package training

import (
	"context"
	"math"
	"time"
)

// IdleRule says what housekeeping does with an open episode that has been
// idle longer than its policy's limit.
type IdleRule string

const (
	// IdleEnd ends it: it enters training as it stands.
	IdleEnd IdleRule = "end"
	// IdleDrop drops it: it is deleted and never trained.
	IdleDrop IdleRule = "drop"
)

// Defaults of the open-episode limits, used when a policy leaves them 0.
const (
	DefaultMaxOpenEpisodes     = 100_000
	DefaultMaxOpenEpisodeSteps = 1_000
)

// OpenEpisodeLimit is how many episodes the policy keeps open at once.
func (s Settings) OpenEpisodeLimit() int {
	if s.MaxOpenEpisodes <= 0 {
		return DefaultMaxOpenEpisodes
	}
	return s.MaxOpenEpisodes
}

// OpenEpisodeStepLimit is how many decisions one open episode may record.
func (s Settings) OpenEpisodeStepLimit() int {
	if s.MaxOpenEpisodeSteps <= 0 {
		return DefaultMaxOpenEpisodeSteps
	}
	return s.MaxOpenEpisodeSteps
}

// Decision is one choose recorded in an open episode: everything its answer
// said, so that a retry is answered the same, and what evaluation needs.
type Decision struct {
	PolicyID int32
	Episode  string
	// Step numbers an episode's decisions from 0, in the order made.
	Step        int
	State       string
	Action      int16
	Greedy      int16
	Probability float64
	Allowed     ActionSet
	Mode        Mode
	Explored    bool
	KnownState  bool
	Revision    int64
	CopyAge     time.Duration
	ChosenAt    time.Time
}

// DecisionRecorder stores a decision durably before it returns. When the
// episode already holds a decision at that step in the same state, it
// stores nothing and returns that one with repeated true.
type DecisionRecorder interface {
	Record(ctx context.Context, d Decision) (stored Decision, repeated bool, err error)
}

// RecordedChoice is a choose answer recorded in an open episode.
type RecordedChoice struct {
	ChooseResult
	Episode string
	Step    int
	// Repeated is true when the step was recorded before: the answer is
	// the recorded one, and nothing new was stored.
	Repeated bool
}

// Keeper chooses and records decisions in open episodes.
type Keeper struct {
	Replica  *Replica
	Recorder DecisionRecorder
}

// ChooseRecorded picks an action as Choose does and records it as the
// given step of the open episode (opening it at step 0) before answering.
func (k Keeper) ChooseRecorded(ctx context.Context, policy, episode string, step int, req ChooseRequest) (RecordedChoice, error) {
	res, in, err := k.Replica.choose(ctx, policy, req, true)
	if err != nil {
		return RecordedChoice{}, err
	}
	d := Decision{
		PolicyID: in.policyID, Episode: episode, Step: step, State: req.State,
		Action: in.action, Greedy: in.greedy, Probability: res.Probability, Allowed: in.allowed,
		Mode: req.Mode, Explored: res.Explored, KnownState: res.KnownState, Revision: res.Revision,
		CopyAge: res.Staleness,
	}
	stored, repeated, err := k.Recorder.Record(ctx, d)
	if err != nil {
		return RecordedChoice{}, err
	}
	if repeated {
		res = stored.answer(in.actions)
	} else {
		in.tally.add(in.action, req.Mode, res.Explored, res.KnownState)
	}
	return RecordedChoice{ChooseResult: res, Episode: episode, Step: step, Repeated: repeated}, nil
}

// answer is the choose answer a recorded decision gave.
func (d Decision) answer(actions []string) ChooseResult {
	return ChooseResult{
		Action: actions[d.Action], Probability: d.Probability, Explored: d.Explored,
		GreedyAction: actions[d.Greedy], KnownState: d.KnownState,
		Allowed: d.Allowed.Names(actions), Revision: d.Revision, Staleness: d.CopyAge,
	}
}

// Names lists the set's actions in the policy's order.
func (s ActionSet) Names(actions []string) []string {
	var names []string
	for i, a := range actions {
		if s.Has(int16(i)) {
			names = append(names, a)
		}
	}
	return names
}

// ValidateEpisodeID checks an episode id given on its own (naming an open
// episode), with the rules a posted episode's id follows.
func ValidateEpisodeID(field, id string, maxLen int) error {
	switch {
	case id == "":
		return Invalid(-1, -1, field, "is missing")
	case len(id) > maxLen:
		return Invalid(-1, -1, field, "is %d bytes, longer than the limit of %d", len(id), maxLen)
	case !PrintableName(id):
		return Invalid(-1, -1, field, "must be valid UTF-8 without control characters")
	}
	return nil
}

// RewardAddition adds a reward to one decision of an open episode.
type RewardAddition struct {
	Reward float64 `json:"reward"`
	// Step names the decision; nil: the latest one.
	Step *int `json:"step,omitempty"`
	// Key makes the addition safe to retry: a second addition with the
	// same key to the same episode adds nothing.
	Key string `json:"key,omitempty"`
}

// Validate checks the addition's own fields.
func (r RewardAddition) Validate(maxKeyLen int) error {
	var l problemList
	checkReward(&l, "reward", r.Reward)
	if r.Step != nil && *r.Step < 0 {
		l.add(-1, -1, "step", "must be 0 or more, got %d", *r.Step)
	}
	if len(r.Key) > maxKeyLen {
		l.add(-1, -1, "key", "is %d bytes, longer than the limit of %d", len(r.Key), maxKeyLen)
	} else if !PrintableName(r.Key) {
		l.add(-1, -1, "key", "must be valid UTF-8 without control characters")
	}
	return l.err()
}

// EndRequest ends an open episode, optionally adding a last reward to its
// latest decision.
type EndRequest struct {
	Reward *float64 `json:"reward,omitempty"`
}

// Validate checks the final reward.
func (r EndRequest) Validate() error {
	var l problemList
	if r.Reward != nil {
		checkReward(&l, "reward", *r.Reward)
	}
	return l.err()
}

func checkReward(l *problemList, field string, r float64) {
	if math.IsNaN(r) || math.IsInf(r, 0) {
		l.add(-1, -1, field, "must be a finite number")
	} else if math.Abs(r) > MaxAbsReward {
		l.add(-1, -1, field, "%g is larger in magnitude than the limit of %g", r, MaxAbsReward)
	}
}

// OpenStep is one recorded decision of an open episode as shown.
type OpenStep struct {
	Step        int       `json:"step"`
	State       string    `json:"state"`
	Action      string    `json:"action"`
	Probability float64   `json:"probability"`
	Allowed     []string  `json:"allowed"`
	Mode        Mode      `json:"mode"`
	Revision    int64     `json:"revision"`
	ChosenAt    time.Time `json:"chosen_at"`
	// Reward is the sum of the rewards added to this decision so far.
	Reward float64 `json:"reward"`
}

// OpenEpisodeView is an open episode as it stands.
type OpenEpisodeView struct {
	ID           string     `json:"id"`
	OpenedAt     time.Time  `json:"opened_at"`
	LastActiveAt time.Time  `json:"last_active_at"`
	Steps        []OpenStep `json:"steps"`
}

// RewardResult says where an addition went and what that decision's
// rewards sum to now.
type RewardResult struct {
	Step int `json:"step"`
	// Reward is the decision's rewards summed, this addition included.
	Reward float64 `json:"reward"`
	// Repeated is true when the key was used before: nothing was added.
	Repeated bool `json:"repeated"`
}

// EndResult says how an episode ended.
type EndResult struct {
	ID    string `json:"id"`
	Steps int    `json:"steps"`
	// Return is the undiscounted sum of the episode's rewards.
	Return float64 `json:"return"`
	// AlreadyEnded is true when the episode had ended before (a retry):
	// nothing changed, and Steps and Return are those stored then.
	AlreadyEnded bool `json:"already_ended"`
}

// OpenEpisodeFigures are a policy's open episodes at a glance.
type OpenEpisodeFigures struct {
	Policy string `json:"-"`
	Open   int64  `json:"open"`
	// Ended counts episodes ended by the application; EndedIdle those
	// housekeeping ended, and Dropped those it dropped, for being idle.
	Ended     int64 `json:"ended"`
	EndedIdle int64 `json:"ended_idle"`
	Dropped   int64 `json:"dropped"`
	// OldestOpenedAt is when the oldest open episode opened; LongestIdleSince
	// when the one idle longest was last active (nil when none is open).
	OldestOpenedAt   *time.Time `json:"oldest_opened_at,omitempty"`
	LongestIdleSince *time.Time `json:"longest_idle_since,omitempty"`
}

// IdleSweep reports what one housekeeping pass closed, per policy.
type IdleSweep struct {
	Policy  string
	Ended   int
	Dropped int
}
