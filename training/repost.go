package training

import (
	"fmt"
	"strings"
)

// EpisodeDifference says how a posted episode differs from the stored
// episode of the same id, or "" when it does not: a repost with the same
// content is a duplicate, one with other content a conflict (an outcome
// that changed must not be dropped silently). actions name the indexes.
func EpisodeDifference(stored, posted EpisodeRecord, actions []string) string {
	if len(stored.States) != len(posted.States) {
		return fmt.Sprintf("the stored episode has %d steps, the posted one %d steps", len(stored.States), len(posted.States))
	}
	name := func(a int16) string {
		if int(a) < len(actions) {
			return actions[a]
		}
		return fmt.Sprint(a)
	}
	for t := range stored.States {
		switch {
		case stored.States[t] != posted.States[t]:
			return fmt.Sprintf("step %d state: stored %q, posted %q", t, Truncate(stored.States[t], 64), Truncate(posted.States[t], 64))
		case stored.Actions[t] != posted.Actions[t]:
			return fmt.Sprintf("step %d action: stored %q, posted %q", t, name(stored.Actions[t]), name(posted.Actions[t]))
		case stored.Rewards[t] != posted.Rewards[t]:
			return fmt.Sprintf("step %d reward: stored %v, posted %v", t, stored.Rewards[t], posted.Rewards[t])
		case probabilityAt(stored, t) != probabilityAt(posted, t):
			return fmt.Sprintf("step %d probability: stored %s, posted %s", t, probabilityText(stored, t), probabilityText(posted, t))
		}
	}
	return ""
}

func probabilityAt(r EpisodeRecord, t int) float64 {
	if r.Probabilities == nil {
		return 0
	}
	return r.Probabilities[t]
}

func probabilityText(r EpisodeRecord, t int) string {
	if p := probabilityAt(r, t); p != 0 {
		return fmt.Sprint(p)
	}
	return "none"
}

// RepostConflict is the error for reposts whose content differs; each
// entry is "episode i (id): difference".
func RepostConflict(differences []string, more int) error {
	msg := "an episode id is stored already with other content; to record an outcome that changed, post the episode once its outcome is known, or under a new id: " + strings.Join(differences, "; ")
	if more > 0 {
		msg += fmt.Sprintf("; and %d more", more)
	}
	return Conflictf("%s", msg)
}
