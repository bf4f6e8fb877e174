package training

import (
	"context"
)

// ReplayRequest asks to train a new policy from another policy's stored
// episodes with other settings, so that settings can be compared on real
// history. Settings left out are the source policy's.
type ReplayRequest struct {
	// Target names the policy to create; it must not exist yet.
	Target             PolicyName    `json:"target"`
	Gamma              *float64      `json:"gamma,omitempty"`
	Alpha              *float64      `json:"alpha,omitempty"`
	Epsilon            *float64      `json:"epsilon,omitempty"`
	EpsilonMin         *float64      `json:"epsilon_min,omitempty"`
	EpsilonDecayVisits *float64      `json:"epsilon_decay_visits,omitempty"`
	Visit              *VisitRule    `json:"visit,omitempty"`
	InitialQ           *float64      `json:"initial_q,omitempty"`
	Window             EpisodeWindow `json:"window"`
}

// Validate checks the request's own fields; TargetSettings checks the
// settings it makes.
func (r ReplayRequest) Validate() error {
	var l problemList
	if ValidatePolicyName(string(r.Target)) != nil {
		l.add(-1, -1, "target", "must name the policy to create: 1 to %d characters of letters, digits, '.', '_' and '-', starting with a letter or digit", MaxPolicyNameLen)
	}
	r.Window.check(&l)
	return l.err()
}

// TargetSettings are the source's settings with the request's changes.
func (r ReplayRequest) TargetSettings(source Settings) (Settings, error) {
	s := source
	s.Actions = append([]string(nil), source.Actions...)
	set := func(dst *float64, v *float64) {
		if v != nil {
			*dst = *v
		}
	}
	set(&s.Gamma, r.Gamma)
	set(&s.Alpha, r.Alpha)
	set(&s.Epsilon, r.Epsilon)
	set(&s.EpsilonMin, r.EpsilonMin)
	set(&s.EpsilonDecayVisits, r.EpsilonDecayVisits)
	set(&s.InitialQ, r.InitialQ)
	if r.Visit != nil {
		s.Visit = *r.Visit
	}
	return s, s.Validate()
}

// ReplayJob is a replay as queued.
type ReplayJob struct {
	Request        ReplayRequest `json:"request"`
	PolicyID       int32         `json:"policy_id"`
	TargetPolicyID int32         `json:"target_policy_id"`
	Episodes       EpisodeSpan   `json:"episodes"`
}

// ReplayResult is what a replay did.
type ReplayResult struct {
	Target           string `json:"target"`
	EpisodesReplayed int64  `json:"episodes_replayed"`
	Steps            int64  `json:"steps"`
	Updates          int64  `json:"updates"`
	// Revision is the target's revision after the last batch.
	Revision int64 `json:"revision"`
}

// ReplayStore is what a replay reads and writes.
type ReplayStore interface {
	EpisodeReader
	PolicyByID(ctx context.Context, id int32) (Policy, error)
	// ClearTable empties a policy's table (a replay run again starts over).
	ClearTable(ctx context.Context, policyID int32) error
	// LearnBatch trains episodes into a policy's table as one training
	// batch, serialised with the policy's other batches, and returns the
	// new revision. The episodes stay as they are: they may be another
	// policy's.
	LearnBatch(ctx context.Context, policyID int32, episodes []StoredEpisode, learn func(BatchInput) BatchResult) (int64, BatchResult, error)
}

// Replay trains the target policy from the source's episodes in arrival
// order, batchEpisodes at a time, with Learn: the same updates the worker
// would have made had the episodes been posted to the target.
func Replay(ctx context.Context, store ReplayStore, job ReplayJob, limits BatchLimits, progress func(Progress)) (ReplayResult, error) {
	target, err := store.PolicyByID(ctx, job.TargetPolicyID)
	if err != nil {
		return ReplayResult{}, err
	}
	if err = store.ClearTable(ctx, target.ID); err != nil {
		return ReplayResult{}, err
	}
	res := ReplayResult{Target: target.Name}
	var batch []StoredEpisode
	steps := 0
	flush := func() error {
		if len(batch) == 0 {
			return nil
		}
		rev, out, learnErr := store.LearnBatch(ctx, target.ID, batch, Learn)
		if learnErr != nil {
			return learnErr
		}
		res.EpisodesReplayed += int64(len(batch))
		res.Steps += int64(out.Steps)
		res.Updates += int64(len(out.AbsDeltas))
		res.Revision = rev
		batch, steps = batch[:0], 0
		progress(Progress{Phase: "replaying episodes", Done: res.EpisodesReplayed, Total: job.Episodes.Episodes})
		return nil
	}
	progress(Progress{Phase: "replaying episodes", Done: 0, Total: job.Episodes.Episodes})
	err = store.ReadEpisodes(ctx, job.PolicyID, job.Episodes, func(ep StoredEpisode) error {
		batch = append(batch, ep)
		steps += len(ep.Actions)
		if !limits.Full(len(batch), steps) {
			return nil
		}
		return flush()
	})
	if err == nil {
		err = flush()
	}
	if err != nil {
		return ReplayResult{}, err
	}
	progress(Progress{Phase: "done", Done: res.EpisodesReplayed, Total: res.EpisodesReplayed})
	return res, nil
}
