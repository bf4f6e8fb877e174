package training

import (
	"fmt"
	"math"
	"time"
	"unicode/utf8"
)

// Step is one decision of an episode as the client reports it.
type Step struct {
	State  string  `json:"state"`
	Action string  `json:"action"`
	Reward float64 `json:"reward"`
	// Probability is the chance the behaviour policy gave this action; it
	// makes off-policy evaluation possible. Nil when the client did not say.
	Probability *float64 `json:"probability,omitempty"`
}

// Episode is one finished episode as the client reports it.
type Episode struct {
	// ID is the client's idempotency key, unique within a policy.
	ID    string `json:"id"`
	Steps []Step `json:"steps"`
}

// Limits bound what one ingest request may carry.
type Limits struct {
	MaxEpisodes    int
	MaxSteps       int
	MaxIDLength    int
	MaxStateLength int
}

// DefaultLimits are the limits unless configured otherwise.
func DefaultLimits() Limits {
	return Limits{MaxEpisodes: 10_000, MaxSteps: 10_000, MaxIDLength: 128, MaxStateLength: 256}
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
	case !printableName(state):
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
}

// StoredEpisode is an episode read back for training or evaluation.
type StoredEpisode struct {
	Seq        int64
	ReceivedAt time.Time
	EpisodeRecord
}

// EncodeEpisodes validates a batch against a policy and the limits and
// returns it in stored form. It reports every problem it finds, each with
// its episode index, step index and field, and encodes nothing if any.
func EncodeEpisodes(p Settings, actionIndex map[string]int16, episodes []Episode, lim Limits) ([]EpisodeRecord, error) {
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
	for i, ep := range episodes {
		switch {
		case ep.ID == "":
			l.add(i, -1, "id", "is missing")
		case len(ep.ID) > lim.MaxIDLength:
			l.add(i, -1, "id", "is %d bytes, longer than the limit of %d", len(ep.ID), lim.MaxIDLength)
		case !printableName(ep.ID):
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
					l.add(i, j, "action", "%q is not one of the policy's actions", truncate(st.Action, 64))
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
		}
	}
	if err := l.err(); err != nil {
		return nil, err
	}
	return encode(actionIndex, episodes, totalSteps), nil
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

func truncate(s string, n int) string {
	if len(s) <= n {
		return s
	}
	for n > 0 && !utf8.RuneStart(s[n]) {
		n--
	}
	return s[:n] + "…"
}
