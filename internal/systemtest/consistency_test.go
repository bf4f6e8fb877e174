package systemtest

import (
	"context"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/storage/pgtest"
)

type policySettingsView struct {
	InitialQ float64 `json:"initial_q"`
	Revision int64   `json:"revision"`
}

func (s *service) settings(policy string) policySettingsView {
	var v policySettingsView
	s.call("GET", "/v1/policies/"+policy, nil, 200).decode(s.t, &v)
	return v
}

// waitChoice waits until a process answers the greedy action want for a
// state at revision (any revision when 0), and returns that answer.
func waitChoice(t *testing.T, s *service, name, policy, state, want string, revision int64) chosen {
	t.Helper()
	var c chosen
	waitFor(t, patience, fmt.Sprintf("the %s process to answer %q for %q", name, want, state), func() bool {
		c = s.choose(policy, state)
		return c.Action == want && (revision == 0 || c.Revision == revision)
	})
	return c
}

// A process that served a state before its policy's initial value changed
// must, within the usual freshness, answer as a process started after the
// change: a pair never updated is worth the new initial value everywhere,
// and both name the same revision.
func TestInitialValueChangeReachesEveryProcess(t *testing.T) {
	t.Parallel()
	db := pgtest.NewDatabase(t)
	warm := startService(t, db, "serve")
	// Untried actions compete at the initial value: that is what changes.
	warm.call("PUT", "/v1/policies/checkout", map[string]any{"actions": []string{"upsell", "plain"}, "alpha": 0.1, "initial_q": 0, "greedy_untried": true}, 201)
	warm.post("checkout", oneStep("e1", "cart", "upsell", 1))
	warm.waitTrained("checkout", 1)
	// Q(cart, upsell) = 0.1 beats plain, never updated, at 0.
	if c := warm.choose("checkout", "cart"); c.Action != "upsell" || !c.KnownState {
		t.Fatalf("before the change: %+v", c)
	}
	var changed policySettingsView
	warm.withHeader("If-Match", "*").call("PUT", "/v1/policies/checkout", map[string]any{"actions": []string{"upsell", "plain"}, "alpha": 0.1, "initial_q": 5, "greedy_untried": true}, 200).decode(t, &changed)

	fresh := startService(t, db, "serve", "--no-worker")
	// plain, never updated, is now worth 5.
	f := fresh.choose("checkout", "cart")
	if f.Action != "plain" || f.Revision != changed.Revision {
		t.Fatalf("a process started after the change answers %+v, want plain at revision %d", f, changed.Revision)
	}
	w := waitChoice(t, warm, "warm", "checkout", "cart", "plain", changed.Revision)
	if w.Revision != f.Revision {
		t.Fatalf("warm %+v and fresh %+v name different revisions", w, f)
	}
	// Settings that leave the table's meaning alone do not make copies reload.
	var same policySettingsView
	warm.withHeader("If-Match", "*").call("PUT", "/v1/policies/checkout", map[string]any{"actions": []string{"upsell", "plain"}, "alpha": 0.2, "initial_q": 5, "greedy_untried": true}, 200).decode(t, &same)
	if same.Revision != changed.Revision {
		t.Fatalf("a change of alpha moved the revision from %d to %d", changed.Revision, same.Revision)
	}
}

// "Evaluate the snapshot, then restore it" must put live exactly the table
// that was evaluated, its initial value included, even after the policy's
// initial value changed; an import brings its document's initial value.
func TestRestoredSnapshotIsTheTableEvaluated(t *testing.T) {
	t.Parallel()
	db := pgtest.NewDatabase(t)
	s := startService(t, db, "serve")
	other := startService(t, db, "serve", "--no-worker")
	settings := func(initialQ float64) map[string]any {
		return map[string]any{"actions": []string{"email", "call"}, "alpha": 0.5, "gamma": 1, "initial_q": initialQ, "greedy_untried": true}
	}
	s.call("PUT", "/v1/policies/dunning", settings(0), 201)
	half := 0.5
	var eps []episodeJSON
	for i := range 20 {
		eps = append(eps, episodeJSON{ID: fmt.Sprint("email-", i), Steps: []stepJSON{{State: "overdue", Action: "email", Reward: 1, Probability: &half}}})
	}
	s.post("dunning", eps...)
	s.waitTrained("dunning", 20)
	// The snapshot knows only email in "overdue"; call keeps the initial 0.
	s.call("POST", "/v1/policies/dunning/snapshots", map[string]any{"name": "email-first"}, 201)
	frozenDoc := s.call("GET", "/v1/policies/dunning/snapshots/email-first/table", nil, 200)
	var frozen tableExport
	frozenDoc.decode(t, &frozen)

	eps = eps[:0]
	for i := range 20 {
		eps = append(eps, episodeJSON{ID: fmt.Sprint("call-", i), Steps: []stepJSON{{State: "overdue", Action: "call", Reward: 3, Probability: &half}}})
	}
	s.post("dunning", eps...)
	s.waitTrained("dunning", 40)
	s.withHeader("If-Match", "*").call("PUT", "/v1/policies/dunning", settings(5), 200)

	request := func(table string) map[string]any {
		return map[string]any{"target": map[string]any{"table": table}, "window": map[string]any{"last": 40}, "seed": 7, "resamples": 200}
	}
	snap, _ := startJob[evaluationResult](s, "/v1/policies/dunning/evaluations", request("email-first"), time.Minute)
	if snap.Status != "succeeded" {
		t.Fatalf("evaluating the snapshot: %s %s", snap.Status, snap.Error)
	}
	// Greedy on the snapshot: email (about 1) beats call (0, its own
	// initial value), so the 20 email episodes carry ratio 2 and return 1.
	if r := snap.Result; r.Weighted.Estimate != 1 || r.Inputs.InitialQ != 0 || r.Inputs.Table != "email-first" || r.Inputs.TableRevision != frozen.Revision {
		t.Fatalf("snapshot evaluation: %+v", r)
	}

	var change struct {
		Revision int64   `json:"revision"`
		InitialQ float64 `json:"initial_q"`
	}
	s.call("POST", "/v1/policies/dunning/snapshots/email-first/restore", nil, 200).decode(t, &change)
	if got := s.settings("dunning"); change.InitialQ != 0 || got.InitialQ != 0 || got.Revision != change.Revision {
		t.Fatalf("after the restore the policy has %+v (restore said %+v), want the snapshot's initial value 0", got, change)
	}
	live, _ := startJob[evaluationResult](s, "/v1/policies/dunning/evaluations", request("live"), time.Minute)
	if live.Status != "succeeded" {
		t.Fatalf("evaluating the restored table: %s %s", live.Status, live.Error)
	}
	a, b := snap.Result, live.Result
	if a.Weighted.Estimate != b.Weighted.Estimate || a.Ordinary.Estimate != b.Ordinary.Estimate || a.EffectiveSampleSize != b.EffectiveSampleSize || a.ZeroWeightEpisodes != b.ZeroWeightEpisodes ||
		b.Inputs.InitialQ != 0 || b.Inputs.TableRevision != change.Revision {
		t.Fatalf("the restored table evaluates to %+v, the snapshot to %+v", b, a)
	}
	waitChoice(t, other, "other", "dunning", "overdue", "email", change.Revision)
	waitChoice(t, s, "restoring", "dunning", "overdue", "email", change.Revision)

	// An import of the exported document brings its initial value too.
	s.withHeader("If-Match", "*").call("PUT", "/v1/policies/dunning", settings(5), 200)
	waitChoice(t, other, "other", "dunning", "overdue", "call", 0)
	var imported struct {
		Revision int64   `json:"revision"`
		InitialQ float64 `json:"initial_q"`
	}
	if r := s.send("PUT", "/v1/policies/dunning/table", "application/json", frozenDoc.Body, false); r.Status != 200 {
		t.Fatalf("import of the exported snapshot: %d %s", r.Status, r.Body)
	} else {
		r.decode(t, &imported)
	}
	if got := s.settings("dunning"); imported.InitialQ != 0 || got.InitialQ != 0 {
		t.Fatalf("after importing a table of initial value 0 the policy has %+v", got)
	}
	waitChoice(t, other, "other", "dunning", "overdue", "email", imported.Revision)

	// CSV carries no initial value; the query names it.
	r := s.send("PUT", "/v1/policies/dunning/table?initial_q=2", "text/csv", []byte("state,action,q,visits\noverdue,email,1,4\n"), false)
	r.decode(t, &imported)
	if r.Status != 200 || imported.InitialQ != 2 || s.settings("dunning").InitialQ != 2 {
		t.Fatalf("CSV import with initial_q=2: %d %s", r.Status, r.Body)
	}
	waitChoice(t, other, "other", "dunning", "overdue", "call", imported.Revision)
	if r := s.send("PUT", "/v1/policies/dunning/table?initial_q=3", "application/json", frozenDoc.Body, false); r.Status != 400 || !strings.Contains(string(r.Body), "initial_q") {
		t.Fatalf("a query that contradicts the document's initial value: %d %s", r.Status, r.Body)
	}
	if r := s.send("PUT", "/v1/policies/dunning/table?initial_q=high", "text/csv", []byte("state,action,q,visits\n"), true); r.Status != 400 {
		t.Fatalf("initial_q=high: %d %s", r.Status, r.Body)
	}
}

// banditEpisodes are one-step episodes of the uniformly random behaviour
// over actions whose rewards all have mean 0 (standard normal).
func banditEpisodes(rng *rand.Rand, prefix string, n int, actions []string) []episodeJSON {
	p := 1 / float64(len(actions))
	eps := make([]episodeJSON, n)
	for i := range eps {
		eps[i] = episodeJSON{ID: fmt.Sprintf("%s-%d", prefix, i), Steps: []stepJSON{{
			State: "offer", Action: actions[rng.IntN(len(actions))], Reward: rng.NormFloat64(), Probability: &p}}}
	}
	return eps
}

// A table judged on the episodes it learned from looks better than it is:
// with five actions worth 0 each, the greedy table picks whichever action
// happened to pay best in its own sample. Every result must say how many
// episodes of its window the target table was trained on, with a note when
// any were, and a window "after a snapshot" must hold only the episodes
// that snapshot's table never learned from.
func TestEvaluationReportsEpisodesTrainedIntoTheTarget(t *testing.T) {
	t.Parallel()
	db := pgtest.NewDatabase(t)
	s := startService(t, db, "serve")
	actions := []string{"none", "coupon", "bundle", "reminder", "upgrade"}
	s.call("PUT", "/v1/policies/offers", map[string]any{"actions": actions, "alpha": 0.1, "gamma": 1}, 201)
	rng := rand.New(rand.NewPCG(11, 5))
	s.post("offers", banditEpisodes(rng, "train", 200, actions)...)
	s.waitTrained("offers", 200)
	s.call("POST", "/v1/policies/offers/snapshots", map[string]any{"name": "after-200"}, 201)

	evaluate := func(body map[string]any) jobView[evaluationResult] {
		t.Helper()
		body["seed"], body["resamples"] = 3, 200
		job, _ := startJob[evaluationResult](s, "/v1/policies/offers/evaluations", body, time.Minute)
		if job.Status != "succeeded" {
			t.Fatalf("evaluation %v: %s %s", body, job.Status, job.Error)
		}
		return job
	}
	const note = "already trained into the target table"
	own := evaluate(map[string]any{"target": map[string]any{"table": "after-200"}})
	if r := own.Result; r.EpisodesRead != 200 || r.EpisodesTrainedIntoTarget != 200 || noteWith(r.Notes, note) == "" {
		t.Fatalf("the snapshot on its own training episodes: %+v", r)
	}

	// 200 fresh episodes, and 10 more that arrive while training waits:
	// the snapshot taken then has not learned from them either.
	s.post("offers", banditEpisodes(rng, "fresh", 200, actions)...)
	s.waitTrained("offers", 400)
	conn := must(pgx.Connect(context.Background(), db))
	defer conn.Close(context.Background())
	id := policyID(t, conn, "offers")
	must(conn.Exec(context.Background(), `SELECT pg_advisory_lock($1, $2)`, trainingLockClass, id))
	s.post("offers", banditEpisodes(rng, "waiting", 10, actions)...)
	s.call("POST", "/v1/policies/offers/snapshots", map[string]any{"name": "after-400"}, 201)
	must(conn.Exec(context.Background(), `SELECT pg_advisory_unlock($1, $2)`, trainingLockClass, id))
	s.waitTrained("offers", 410)

	held := evaluate(map[string]any{"target": map[string]any{"table": "after-200"}, "window": map[string]any{"after_snapshot": "after-200"}})
	if r := held.Result; r.EpisodesRead != 210 || held.Episodes.Episodes != 210 || r.EpisodesTrainedIntoTarget != 0 || noteWith(r.Notes, note) != "" {
		t.Fatalf("the snapshot on the episodes after it: %+v (window %+v)", r, held.Episodes)
	}
	waiting := evaluate(map[string]any{"target": map[string]any{"table": "after-400"}, "window": map[string]any{"after_snapshot": "after-400"}})
	if r := waiting.Result; r.EpisodesRead != 10 || r.EpisodesTrainedIntoTarget != 0 {
		t.Fatalf("the episodes waiting for training when after-400 was taken: %+v", r)
	}
	// The live table has learned from everything, the held-out window too.
	live := evaluate(map[string]any{"window": map[string]any{"after_snapshot": "after-200"}})
	if r := live.Result; r.EpisodesRead != 210 || r.EpisodesTrainedIntoTarget != 210 || noteWith(r.Notes, note) == "" {
		t.Fatalf("the live table on the episodes after after-200: %+v", r)
	}
	// A replay learns from the source's episodes: a table of the replay is
	// in-sample on the window it replayed, and only on that.
	replay, _ := startJob[json.RawMessage](s, "/v1/policies/offers/replays",
		map[string]any{"target": "offers-slow", "alpha": 0.01, "window": map[string]any{"after_snapshot": "after-200"}}, time.Minute)
	if replay.Status != "succeeded" {
		t.Fatalf("replay: %s %s", replay.Status, replay.Error)
	}
	cross := evaluate(map[string]any{"target": map[string]any{"policy": "offers-slow"}})
	if r := cross.Result; r.EpisodesRead != 410 || r.EpisodesTrainedIntoTarget != 210 || noteWith(r.Notes, note) == "" {
		t.Fatalf("the replay's table on every episode: %+v", r)
	}
	s.call("POST", "/v1/policies/offers/evaluations", map[string]any{"window": map[string]any{"after_snapshot": "nope"}}, 404)
	s.call("POST", "/v1/policies/offers/evaluations", map[string]any{"window": map[string]any{"after_snapshot": "live"}}, 400)
	s.call("POST", "/v1/policies/offers/evaluations", map[string]any{"window": map[string]any{"after_snapshot": "after-400", "since": "2001-01-01T00:00:00Z"}}, 202)
}
