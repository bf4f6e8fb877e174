package storage_test

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"testing"
	"time"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/training"
)

// An id is either posted or kept open, never both: a post and a recorded
// decision opening the same id at the same moment, many times over, end
// with exactly one of them accepted each time.
func TestPostAndOpeningOfOneIDNeverBothSucceed(t *testing.T) {
	ctx := context.Background()
	db := openDB(t)
	settings := training.DefaultSettings()
	settings.Actions = []string{"a", "b"}
	p, _, err := db.PutPolicy(ctx, "race", settings)
	if err != nil {
		t.Fatal(err)
	}
	batcher := db.NewDecisionBatcher(storage.GroupCommit{MaxBatch: 256, InFlight: 4, Window: time.Millisecond})
	runCtx, stop := context.WithCancel(ctx)
	done := make(chan struct{})
	go func() { _ = batcher.Run(runCtx); close(done) }()
	defer func() { stop(); <-done }()

	posted, opened := 0, 0
	for i := range 60 {
		id := fmt.Sprintf("race-%d", i)
		var postErr, openErr error
		var wg sync.WaitGroup
		wg.Go(func() {
			_, postErr = db.Ingest(ctx, "race", []training.Episode{{ID: id, Steps: []training.Step{{State: "s", Action: "a", Reward: 1}}}})
		})
		wg.Go(func() {
			_, _, openErr = batcher.Record(ctx, training.Decision{PolicyID: p.ID, Episode: id, Step: 0, State: "s",
				Probability: 1, Allowed: training.ActionSet{3}, Mode: training.Greedy})
		})
		wg.Wait()
		var verr *training.ValidationError
		switch {
		case postErr == nil && errors.Is(openErr, training.ErrConflict):
			posted++
		case openErr == nil && errors.As(postErr, &verr):
			opened++
		default:
			t.Fatalf("%s: post %v, opening %v; want exactly one refused", id, postErr, openErr)
		}
	}
	t.Logf("60 races: the post won %d, the opening %d", posted, opened)
}

// A Record after the batcher's Run has ended is refused as unavailable
// rather than left waiting.
func TestStoppedBatcherRefusesDecisions(t *testing.T) {
	db := openDB(t)
	batcher := db.NewDecisionBatcher(storage.GroupCommit{MaxBatch: 8, InFlight: 4, Window: time.Millisecond})
	ctx, stop := context.WithCancel(context.Background())
	stop()
	if err := batcher.Run(ctx); err != nil {
		t.Fatal(err)
	}
	_, _, err := batcher.Record(context.Background(), training.Decision{Episode: "e"})
	if !errors.Is(err, training.ErrUnavailable) {
		t.Fatalf("Record after Run ended: %v, want unavailable", err)
	}
}

// Two processes' batchers racing for the same next steps: each step of
// each episode is stored once and every other request for it is answered
// with that same decision (or refused, when it names another state); a
// step past the policy's limit is refused; an end racing a next step
// either carries the step or refuses it, never loses an answered one.
func TestRacingNextStepsAreRecordedOnce(t *testing.T) {
	ctx := context.Background()
	db := openDB(t)
	settings := training.DefaultSettings()
	settings.Actions = []string{"a", "b"}
	settings.MaxOpenEpisodeSteps = 6
	p, _, err := db.PutPolicy(ctx, "racing", settings)
	if err != nil {
		t.Fatal(err)
	}
	var batchers []*storage.DecisionBatcher
	runCtx, stop := context.WithCancel(ctx)
	var running sync.WaitGroup
	defer func() { stop(); running.Wait() }()
	for range 2 {
		b := db.NewDecisionBatcher(storage.GroupCommit{MaxBatch: 64, InFlight: 2, Window: 200 * time.Microsecond})
		batchers = append(batchers, b)
		running.Go(func() { _ = b.Run(runCtx) })
	}
	ender := db.NewEndBatcher(storage.GroupCommit{MaxBatch: 64, InFlight: 1})
	running.Go(func() { _ = ender.Run(runCtx) })
	decision := func(episode string, step int, state string, action int16) training.Decision {
		return training.Decision{PolicyID: p.ID, Episode: episode, Step: step, State: state, Action: action,
			Probability: 0.5, Allowed: training.ActionSet{3}, Mode: training.Explore}
	}
	const episodes, racers = 12, 6
	type answer struct {
		stored   training.Decision
		repeated bool
		err      error
	}
	// Step by step, every racer of every episode at once: racers draw
	// different actions, so a second store would show in the answers.
	for step := range settings.MaxOpenEpisodeSteps + 1 {
		answers := make([][]answer, episodes)
		var wg sync.WaitGroup
		for e := range episodes {
			answers[e] = make([]answer, racers+1)
			for r := range racers + 1 {
				state := fmt.Sprintf("s%d", step)
				if r == racers {
					state = "elsewhere" // names another state: refused unless it wins
				}
				wg.Go(func() {
					a := &answers[e][r]
					a.stored, a.repeated, a.err = batchers[r%2].Record(ctx, decision(fmt.Sprintf("e%d", e), step, state, int16(r%2)))
				})
			}
		}
		wg.Wait()
		for e := range episodes {
			if step == settings.MaxOpenEpisodeSteps {
				for r, a := range answers[e] {
					if !errors.Is(a.err, training.ErrConflict) {
						t.Fatalf("episode %d step %d (past the limit), racer %d: %v, want a conflict", e, step, r, a.err)
					}
				}
				continue
			}
			var winner *training.Decision
			for r, a := range answers[e] {
				if a.err == nil && !a.repeated {
					if winner != nil {
						t.Fatalf("episode %d step %d stored twice: %+v and %+v", e, step, *winner, a.stored)
					}
					winner = &answers[e][r].stored
				}
			}
			if winner == nil {
				t.Fatalf("episode %d step %d: no answer stored it: %+v", e, step, answers[e])
			}
			for r, a := range answers[e] {
				state := fmt.Sprintf("s%d", step)
				if r == racers {
					state = "elsewhere"
				}
				switch {
				case state != winner.State && errors.Is(a.err, training.ErrConflict):
				case a.err != nil:
					t.Fatalf("episode %d step %d racer %d: %v (stored: %+v)", e, step, r, a.err, *winner)
				case a.stored.State != winner.State || a.stored.Action != winner.Action || a.stored.Step != step:
					t.Fatalf("episode %d step %d racer %d answered %+v, the stored decision is %+v", e, step, r, a.stored, *winner)
				}
			}
			// A step that skips one is refused and stores nothing.
			if _, _, err := batchers[e%2].Record(ctx, decision(fmt.Sprintf("e%d", e), step+2, "ahead", 0)); !errors.Is(err, training.ErrConflict) {
				t.Fatalf("episode %d: step %d after step %d: %v, want a conflict", e, step+2, step, err)
			}
		}
	}
	for e := range episodes {
		v, err := db.OpenEpisode(ctx, "racing", fmt.Sprintf("e%d", e))
		if err != nil {
			t.Fatal(err)
		}
		if len(v.Steps) != settings.MaxOpenEpisodeSteps {
			t.Fatalf("episode %d holds %d steps, want %d", e, len(v.Steps), settings.MaxOpenEpisodeSteps)
		}
	}

	// Ends racing next steps: an answered step is in the ended episode.
	for e := range episodes {
		id := fmt.Sprintf("f%d", e)
		if _, _, err := batchers[0].Record(ctx, decision(id, 0, "s0", 0)); err != nil {
			t.Fatal(err)
		}
		var wg sync.WaitGroup
		var stepErr, endErr error
		var ended training.EndResult
		wg.Go(func() { _, _, stepErr = batchers[e%2].Record(ctx, decision(id, 1, "s1", 1)) })
		wg.Go(func() { ended, endErr = ender.EndOpenEpisode(ctx, "racing", id, training.EndRequest{}) })
		wg.Wait()
		if endErr != nil {
			t.Fatal(endErr)
		}
		switch {
		case stepErr == nil && ended.Steps == 2, errors.Is(stepErr, training.ErrConflict) && ended.Steps == 1:
		default:
			t.Fatalf("episode %s: next step %v, end stored %d steps", id, stepErr, ended.Steps)
		}
	}
}

// Ends that arrive together are committed together, and each still gets
// its own answer: ended with its final reward, refused alone when that
// reward is out of bounds (its episode stays open), a retry in the same
// batch told it ended, an unknown id not found; the ended episodes enter
// the log in the order their ends arrived.
func TestEndsCommittedTogetherAnswerEachRequest(t *testing.T) {
	ctx := context.Background()
	db := openDB(t)
	p := putPolicy(t, db, "ends", training.DefaultSettings())
	recorder := db.NewDecisionBatcher(storage.GroupCommit{MaxBatch: 64, InFlight: 2})
	// A long window and one commit at a time: the ends below, sent
	// together, gather into few batches.
	ender := db.NewEndBatcher(storage.GroupCommit{MaxBatch: 64, InFlight: 1, Window: 50 * time.Millisecond})
	runUntilCleanup(t, recorder.Run, ender.Run)

	const episodes = 40
	recordSteps(t, recorder, p, episodes, func(e int) int { return 1 + e%3 })
	final := func(e int) *float64 {
		v := float64(e)
		if e%10 == 7 {
			v = 2 * training.MaxAbsReward // out of bounds: refused
		}
		return &v
	}
	type answer struct {
		res training.EndResult
		err error
	}
	answers := make([]answer, episodes+2)
	var wg sync.WaitGroup
	for e := range episodes {
		wg.Go(func() {
			answers[e].res, answers[e].err = ender.EndOpenEpisode(ctx, "ends", fmt.Sprintf("e%d", e), training.EndRequest{Reward: final(e)})
		})
	}
	wg.Go(func() {
		answers[episodes].res, answers[episodes].err = ender.EndOpenEpisode(ctx, "ends", "e3", training.EndRequest{})
	})
	wg.Go(func() {
		answers[episodes+1].res, answers[episodes+1].err = ender.EndOpenEpisode(ctx, "ends", "nobody", training.EndRequest{})
	})
	wg.Wait()

	for e := range episodes {
		a := answers[e]
		if e%10 == 7 {
			var invalid *training.ValidationError
			if !errors.As(a.err, &invalid) {
				t.Fatalf("e%d with an out-of-bounds final reward: %v, want refused", e, a.err)
			}
			if _, openErr := db.OpenEpisode(ctx, "ends", fmt.Sprintf("e%d", e)); openErr != nil {
				t.Fatalf("e%d, refused, is no longer open: %v", e, openErr)
			}
			continue
		}
		if a.err != nil {
			t.Fatalf("e%d: %v", e, a.err)
		}
		if e == 3 {
			continue // ended twice at once: below
		}
		if a.res.Steps != 1+e%3 || a.res.Return != float64(e) {
			t.Fatalf("e%d ended with %+v, want %d steps and return %d", e, a.res, 1+e%3, e)
		}
	}
	// e3 was ended twice at once, with a final reward of 3 and without:
	// one answer ended it, the other says it had ended, and both tell the
	// return the first gave it.
	first, second := answers[3], answers[episodes]
	wantReturn := 0.0
	if !first.res.AlreadyEnded {
		wantReturn = 3
	}
	if first.err != nil || second.err != nil || first.res.AlreadyEnded == second.res.AlreadyEnded ||
		first.res.Steps != 1 || second.res.Steps != 1 || first.res.Return != wantReturn || second.res.Return != wantReturn {
		t.Fatalf("e3 ended twice at once: %+v and %+v", first, second)
	}
	if !errors.Is(answers[episodes+1].err, training.ErrNotFound) {
		t.Fatalf("ending an unknown episode: %v, want not found", answers[episodes+1].err)
	}
	again, err := ender.EndOpenEpisode(ctx, "ends", "e5", training.EndRequest{})
	if err != nil || !again.AlreadyEnded || again.Steps != 3 || again.Return != 5 {
		t.Fatalf("ending e5 again: %+v, %v", again, err)
	}
	figures, err := db.PolicyOpenEpisodes(ctx, "ends")
	if err != nil {
		t.Fatal(err)
	}
	if figures.Open != 4 || figures.Ended != episodes-4 {
		t.Fatalf("counts after the ends: %+v, want 4 open and %d ended", figures, episodes-4)
	}
}

// Reward additions that arrive together are committed together, and each
// gets its own answer: additions to one step sum, in arrival order; a key
// used before (in an earlier batch or the same one) adds nothing and
// answers the step and sum it went to; an addition refused on its own (no
// such step, a sum out of bounds, an episode not open) adds nothing.
func TestRewardsAddedTogetherAnswerEachRequest(t *testing.T) {
	ctx := context.Background()
	db := openDB(t)
	p := putPolicy(t, db, "rewards", training.DefaultSettings())
	recorder := db.NewDecisionBatcher(storage.GroupCommit{MaxBatch: 64, InFlight: 2})
	rewarder := db.NewRewardBatcher(storage.GroupCommit{MaxBatch: 256, InFlight: 1, Window: 50 * time.Millisecond})
	ender := db.NewEndBatcher(storage.GroupCommit{MaxBatch: 64, InFlight: 1})
	runUntilCleanup(t, recorder.Run, rewarder.Run, ender.Run)

	const episodes = 12
	recordSteps(t, recorder, p, episodes, func(int) int { return 2 })
	if _, err := ender.EndOpenEpisode(ctx, "rewards", "e0", training.EndRequest{}); err != nil {
		t.Fatal(err)
	}
	if _, err := rewarder.AddReward(ctx, "rewards", "e1", training.RewardAddition{Reward: 2, Key: "early"}); err != nil {
		t.Fatal(err)
	}
	stepZero := 0
	type addition struct {
		episode string
		add     training.RewardAddition
	}
	// For every open episode but e0 (ended): 1 to step 0, 10 keyed "k" to
	// the latest step twice, 100 unkeyed to the latest step, a step that
	// does not exist, and a sum out of bounds; e1 repeats its early key.
	var all []addition
	for e := 1; e < episodes; e++ {
		id := fmt.Sprintf("e%d", e)
		nine := 9
		all = append(all,
			addition{id, training.RewardAddition{Reward: 1, Step: &stepZero}},
			addition{id, training.RewardAddition{Reward: 10, Key: "k"}},
			addition{id, training.RewardAddition{Reward: 10, Key: "k"}},
			addition{id, training.RewardAddition{Reward: 100}},
			addition{id, training.RewardAddition{Reward: 1, Step: &nine}},
			addition{id, training.RewardAddition{Reward: training.MaxAbsReward}},
		)
	}
	all = append(all, addition{"e1", training.RewardAddition{Reward: 5, Key: "early"}},
		addition{"e0", training.RewardAddition{Reward: 1}}, addition{"nobody", training.RewardAddition{Reward: 1}})
	results := make([]training.RewardResult, len(all))
	errs := make([]error, len(all))
	// One episode's additions in order, episodes at once: each episode's
	// additions are sent one after another so that their order is known.
	var wg sync.WaitGroup
	for e := 1; e < episodes; e++ {
		wg.Go(func() {
			for i := range 6 {
				j := (e-1)*6 + i
				results[j], errs[j] = rewarder.AddReward(ctx, "rewards", all[j].episode, all[j].add)
			}
		})
	}
	for j := len(all) - 3; j < len(all); j++ {
		wg.Go(func() { results[j], errs[j] = rewarder.AddReward(ctx, "rewards", all[j].episode, all[j].add) })
	}
	wg.Wait()

	var invalid *training.ValidationError
	for e := 1; e < episodes; e++ {
		j := (e - 1) * 6
		early := 0.0
		if e == 1 {
			early = 2
		}
		want := []training.RewardResult{{Step: 0, Reward: 1}, {Step: 1, Reward: early + 10}, {Step: 1, Reward: early + 10, Repeated: true}, {Step: 1, Reward: early + 110}}
		for i, w := range want {
			if errs[j+i] != nil || results[j+i] != w {
				t.Fatalf("e%d addition %d: %+v, %v; want %+v", e, i, results[j+i], errs[j+i], w)
			}
		}
		if !errors.As(errs[j+4], &invalid) || !errors.As(errs[j+5], &invalid) {
			t.Fatalf("e%d: a missing step gave %v, a sum out of bounds %v; want both refused", e, errs[j+4], errs[j+5])
		}
		v, err := db.OpenEpisode(ctx, "rewards", fmt.Sprintf("e%d", e))
		if err != nil {
			t.Fatal(err)
		}
		if v.Steps[0].Reward != 1 || v.Steps[1].Reward != early+110 {
			t.Fatalf("e%d stores rewards %g and %g, want 1 and %g", e, v.Steps[0].Reward, v.Steps[1].Reward, early+110)
		}
	}
	n := len(all)
	if errs[n-3] != nil || !results[n-3].Repeated || results[n-3].Step != 1 {
		t.Fatalf("e1's early key again: %+v, %v; want the step it went to, repeated", results[n-3], errs[n-3])
	}
	if !errors.Is(errs[n-2], training.ErrConflict) || !errors.Is(errs[n-1], training.ErrNotFound) {
		t.Fatalf("an ended episode: %v (want a conflict); an unknown one: %v (want not found)", errs[n-2], errs[n-1])
	}

	// One key sent eight times at once to each of ten episodes: all but
	// the first to arrive gather into the batch after it, so most repeats
	// meet in one batch. Each key is added once.
	same := make([][]training.RewardResult, episodes)
	for e := 2; e < episodes; e++ {
		same[e] = make([]training.RewardResult, 8)
		for i := range same[e] {
			wg.Go(func() {
				var err error
				if same[e][i], err = rewarder.AddReward(ctx, "rewards", fmt.Sprintf("e%d", e), training.RewardAddition{Reward: 1000, Step: &stepZero, Key: "same"}); err != nil {
					t.Error(err)
				}
			})
		}
	}
	wg.Wait()
	for e := 2; e < episodes; e++ {
		added := 0
		for _, r := range same[e] {
			if !r.Repeated {
				added++
			}
			if r.Step != 0 || r.Reward != 1001 {
				t.Fatalf("e%d: a key sent eight times at once answered %+v, want step 0 summing to 1001", e, r)
			}
		}
		if added != 1 {
			t.Fatalf("e%d: a key sent eight times at once was added %d times", e, added)
		}
	}

	// A key used before answers the sum of the step it went to, also once
	// a later step is the latest: e1's early key went to step 1, which
	// sums 2 + 10 + 100.
	next := training.Decision{PolicyID: p.ID, Episode: "e1", Step: 2, State: "s2", Probability: 1, Allowed: training.ActionSet{3}, Mode: training.Greedy}
	if _, _, err := recorder.Record(ctx, next); err != nil {
		t.Fatal(err)
	}
	again, err := rewarder.AddReward(ctx, "rewards", "e1", training.RewardAddition{Reward: 5, Key: "early"})
	if want := (training.RewardResult{Step: 1, Reward: 112, Repeated: true}); err != nil || again != want {
		t.Fatalf("e1's early key after step 2: %+v, %v; want %+v", again, err, want)
	}
}

// putPolicy stores a policy of two actions, a and b, with settings.
// recordSteps records greedy decisions for episodes e0, e1, ... of p,
// stepsOf(e) of them for episode e, each answered before the next is sent.
func recordSteps(t *testing.T, recorder *storage.DecisionBatcher, p training.Policy, episodes int, stepsOf func(int) int) {
	t.Helper()
	for e := range episodes {
		for step := range stepsOf(e) {
			d := training.Decision{PolicyID: p.ID, Episode: fmt.Sprintf("e%d", e), Step: step, State: fmt.Sprintf("s%d", step),
				Probability: 1, Allowed: training.ActionSet{3}, Mode: training.Greedy}
			if _, _, err := recorder.Record(context.Background(), d); err != nil {
				t.Fatal(err)
			}
		}
	}
}

func putPolicy(t *testing.T, db *storage.DB, name string, settings training.Settings) training.Policy {
	t.Helper()
	settings.Actions = []string{"a", "b"}
	p, _, err := db.PutPolicy(context.Background(), name, settings)
	if err != nil {
		t.Fatal(err)
	}
	return p
}

// runUntilCleanup runs each of runs (a batcher's Run) until the test ends.
func runUntilCleanup(t *testing.T, runs ...func(context.Context) error) {
	ctx, stop := context.WithCancel(context.Background())
	var running sync.WaitGroup
	for _, run := range runs {
		running.Go(func() { _ = run(ctx) })
	}
	t.Cleanup(func() { stop(); running.Wait() })
}
