package training

import "fmt"

// StateSighting is where a batch first mentions a state.
type StateSighting struct {
	State   string
	Episode int
	Step    int
}

// FirstSightings lists the distinct states of episodes in order of first
// mention; positions maps each record to its index in the request.
func FirstSightings(records []EpisodeRecord, positions []int) []StateSighting {
	seen := map[string]bool{}
	var out []StateSighting
	for i, r := range records {
		for j, s := range r.States {
			if !seen[s] {
				seen[s] = true
				out = append(out, StateSighting{State: s, Episode: positions[i], Step: j})
			}
		}
	}
	return out
}

// StatesBeyondQuota refuses a batch that brings more new states than a
// policy has room for: room of them, in order of first mention, would fit;
// the error names every later one (up to the reporting limit) by episode,
// step and field. It returns nil when all fit.
func StatesBeyondQuota(sightings []StateSighting, isNew func(string) bool, room, maxStates int64) error {
	var l problemList
	var fresh, beyond int64
	for _, s := range sightings {
		if !isNew(s.State) {
			continue
		}
		fresh++
		if fresh <= room {
			continue
		}
		beyond++
		l.add(s.Episode, s.Step, "state", "%q would be a new state beyond the policy's max_states of %d", Truncate(s.State, 64), maxStates)
	}
	if beyond == 0 {
		return nil
	}
	return &QuotaError{
		Detail: fmt.Sprintf("the batch brings %d new states and the policy has room for %d more (max_states %d); nothing was stored: "+
			"raise max_states with PUT on the policy, or send fewer distinct states", fresh, max(room, 0), maxStates),
		Problems: l.err().(*ValidationError).Problems, //nolint:errorlint // err builds this *ValidationError itself: never wrapped
	}
}
