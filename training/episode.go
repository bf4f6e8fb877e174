package training

import (
	"fmt"
	"math"
	"time"
)

// Step is one decision of an episode as the client reports it.
type Step struct {
	State  string  `json:"state"`
	Action string  `json:"action"`
	Reward float64 `json:"reward"`
	// Probability is the chance the behaviour policy gave this action; it
	// makes off-policy evaluation possible. Nil when the client did not say.
	Probability *float64 `json:"probability,omitempty"`
	// Allowed is the set of actions the step's action was chosen from (the
	// choose request's allowed, as the choose answer returns it), so that
	// evaluation can tell what a target would have done among them. Nil
	// when the client did not say: then every action counts as allowed.
	Allowed []string `json:"allowed,omitempty"`
}

// Episode is one finished episode as the client reports it.
type Episode struct {
	// ID is the client's idempotency key, unique within a policy.
	ID    string `json:"id"`
	Steps []Step `json:"steps"`
}

// Limits bound what one ingest request may carry, and what the service
// keeps: each API process holds a slot per action for every state of the
// policies it serves, so states x actions is bounded per policy, and the
// policies, snapshots and queued work are counted.
type Limits struct {
	MaxEpisodes    int
	MaxSteps       int
	MaxIDLength    int
	MaxStateLength int

	// MaxPairsPerPolicy bounds max_states x actions of every policy.
	MaxPairsPerPolicy     int64
	MaxPolicies           int
	MaxSnapshotsPerPolicy int
	// MaxOpenJobsPerPolicy bounds a policy's queued and running jobs.
	MaxOpenJobsPerPolicy int
}

// DefaultLimits are the limits unless configured otherwise.
func DefaultLimits() Limits {
	return Limits{MaxEpisodes: 10_000, MaxSteps: 10_000, MaxIDLength: 128, MaxStateLength: 256,
		MaxPairsPerPolicy: 1_000_000, MaxPolicies: 1000, MaxSnapshotsPerPolicy: 100, MaxOpenJobsPerPolicy: 4}
}

// MaxAbsReward bounds a reward's magnitude so that returns and Q stay
// finite: a return sums at most MaxSteps rewards, and a float64 overflows
// near 1.8e308. 1e15 is below 2^53, where float64 still tells apart rewards
// that differ by one unit.
const MaxAbsReward = 1e15

// stateProblem says what is wrong with a state name, or "" when nothing is.
// States are stored and shown as text, so control characters (NUL among
// them, which PostgreSQL text cannot hold) are refused.
func stateProblem(state string, maxLen int) string {
	switch {
	case state == "":
		return "is missing"
	case len(state) > maxLen:
		return fmt.Sprintf("is %d bytes, longer than the limit of %d", len(state), maxLen)
	case !PrintableName(state):
		return "must be valid UTF-8 without control characters"
	}
	return ""
}

// ValidateStateName checks a state name given on its own (to choose, or to
// read a state), not inside an episode.
func ValidateStateName(state string, maxLen int) error {
	if problem := stateProblem(state, maxLen); problem != "" {
		return Invalid(-1, -1, "state", "%s", problem)
	}
	return nil
}

// EpisodeRecord is a validated episode in the form it is stored and
// trained from: parallel columns, actions as indexes into the policy's list.
type EpisodeRecord struct {
	ID      string
	States  []string
	Actions []int16
	Rewards []float64
	// Probabilities holds 0 for a step without one, and is nil when no step
	// had one (0 is never a valid probability of an action that was taken).
	Probabilities []float64
	// Allowed holds each step's allowed set (an ActionSet of
	// ActionSetWidth(actions) bytes a step, AllowedAt reads it), all zero
	// for a step without one, and is nil when no step had one.
	Allowed []byte
}

// StoredEpisode is an episode read back for training or evaluation.
type StoredEpisode struct {
	Seq        int64
	ReceivedAt time.Time
	EpisodeRecord
}

// ValidateAndEncodeEpisodes validates a batch against a policy's settings
// and the limits and returns it in stored form. It reports every problem
// it finds, each with its episode index, step index and field, and encodes
// nothing if any.
func ValidateAndEncodeEpisodes(p Settings, episodes []Episode, lim Limits) ([]EpisodeRecord, error) {
	actionIndex := p.ActionIndex()
	var l problemList
	if len(episodes) == 0 {
		l.add(-1, -1, "episodes", "must hold at least one episode")
	}
	if len(episodes) > lim.MaxEpisodes {
		l.add(-1, -1, "episodes", "holds %d episodes, more than the limit of %d per request", len(episodes), lim.MaxEpisodes)
		return nil, l.err()
	}
	seen := make(map[string]int, len(episodes))
	totalSteps := 0
	width := ActionSetWidth(len(p.Actions))
	allowed := allowedSets(episodes, width, lim.MaxSteps)
	for i, ep := range episodes {
		switch {
		case ep.ID == "":
			l.add(i, -1, "id", "is missing")
		case len(ep.ID) > lim.MaxIDLength:
			l.add(i, -1, "id", "is %d bytes, longer than the limit of %d", len(ep.ID), lim.MaxIDLength)
		case !PrintableName(ep.ID):
			l.add(i, -1, "id", "must be valid UTF-8 without control characters")
		default:
			if first, dup := seen[ep.ID]; dup {
				l.add(i, -1, "id", "repeats the id of episode %d in this request", first)
			} else {
				seen[ep.ID] = i
			}
		}
		switch {
		case len(ep.Steps) == 0:
			l.add(i, -1, "steps", "must hold at least one step")
		case len(ep.Steps) > lim.MaxSteps:
			l.add(i, -1, "steps", "holds %d steps, more than the limit of %d", len(ep.Steps), lim.MaxSteps)
			continue
		}
		totalSteps += len(ep.Steps)
		for j, st := range ep.Steps {
			if problem := stateProblem(st.State, lim.MaxStateLength); problem != "" {
				l.add(i, j, "state", "%s", problem)
			} else if p.StateShape != nil {
				if problem := p.StateShape.Problem(st.State); problem != "" {
					l.add(i, j, "state", "%s", problem)
				}
			}
			if _, ok := actionIndex[st.Action]; !ok {
				if st.Action == "" {
					l.add(i, j, "action", "is missing")
				} else {
					l.add(i, j, "action", "%q is not one of the policy's actions", Truncate(st.Action, 64))
				}
			}
			if math.IsNaN(st.Reward) || math.IsInf(st.Reward, 0) {
				l.add(i, j, "reward", "must be a finite number")
			} else if math.Abs(st.Reward) > MaxAbsReward {
				l.add(i, j, "reward", "%g is larger in magnitude than the limit of %g", st.Reward, MaxAbsReward)
			}
			if pr := st.Probability; pr != nil && !(*pr > 0 && *pr <= 1) {
				l.add(i, j, "probability", "must be in (0, 1], got %v", *pr)
			} else if pr == nil && p.RequireProbability {
				l.add(i, j, "probability", "is missing; the policy's require_probability asks for it on every step")
			}
			if st.Allowed != nil {
				checkAllowed(&l, i, j, st, actionIndex, ActionSet(allowed[i][j*width:(j+1)*width]))
			}
		}
	}
	if err := l.err(); err != nil {
		return nil, err
	}
	records := encode(actionIndex, episodes, totalSteps)
	for i := range allowed {
		records[i].Allowed = allowed[i]
	}
	return records, nil
}

// allowedSets makes room for the allowed sets of every episode that has a
// step with one, in one backing array: width bytes a step. Episodes without
// any (and those over the step limit, which are refused) get nil; so does
// the whole batch when no step has a set.
func allowedSets(episodes []Episode, width, maxSteps int) [][]byte {
	steps := 0
	for _, ep := range episodes {
		if len(ep.Steps) <= maxSteps && anyAllowed(ep.Steps) {
			steps += len(ep.Steps)
		}
	}
	if steps == 0 {
		return nil
	}
	backing := make([]byte, steps*width)
	sets := make([][]byte, len(episodes))
	for i, ep := range episodes {
		if len(ep.Steps) <= maxSteps && anyAllowed(ep.Steps) {
			n := len(ep.Steps) * width
			sets[i], backing = backing[:n:n], backing[n:]
		}
	}
	return sets
}

func anyAllowed(steps []Step) bool {
	for _, st := range steps {
		if st.Allowed != nil {
			return true
		}
	}
	return false
}

// checkAllowed validates a step's allowed set and writes it into set.
func checkAllowed(l *problemList, i, j int, st Step, actionIndex map[string]int16, set ActionSet) {
	if len(st.Allowed) == 0 {
		l.add(i, j, "allowed", "must name at least one action when given")
		return
	}
	for k, name := range st.Allowed {
		a, ok := actionIndex[name]
		switch {
		case !ok:
			l.add(i, j, fmt.Sprintf("allowed[%d]", k), "%q is not one of the policy's actions", Truncate(name, 64))
		case !set.add(a):
			l.add(i, j, fmt.Sprintf("allowed[%d]", k), "repeats %q", Truncate(name, 64))
		}
	}
	if a, ok := actionIndex[st.Action]; ok && !set.Has(a) {
		l.add(i, j, "allowed", "%q, the step's action, is not in it: a step's action must be one of those it was chosen from", Truncate(st.Action, 64))
	}
}

// encode packs valid episodes into shared backing arrays: one allocation per
// column for the whole batch instead of one per episode.
func encode(actionIndex map[string]int16, episodes []Episode, totalSteps int) []EpisodeRecord {
	records := make([]EpisodeRecord, len(episodes))
	states := make([]string, 0, totalSteps)
	actions := make([]int16, 0, totalSteps)
	rewards := make([]float64, 0, totalSteps)
	var probs []float64
	for i, ep := range episodes {
		start := len(states)
		hasProb := false
		for _, st := range ep.Steps {
			states = append(states, st.State)
			actions = append(actions, actionIndex[st.Action])
			rewards = append(rewards, st.Reward)
			hasProb = hasProb || st.Probability != nil
		}
		end := len(states)
		rec := EpisodeRecord{ID: ep.ID, States: states[start:end:end], Actions: actions[start:end:end], Rewards: rewards[start:end:end]}
		if hasProb {
			if probs == nil {
				probs = make([]float64, totalSteps)
			}
			p := probs[start:end:end]
			for j, st := range ep.Steps {
				if st.Probability != nil {
					p[j] = *st.Probability
				}
			}
			rec.Probabilities = p
		}
		records[i] = rec
	}
	return records
}
