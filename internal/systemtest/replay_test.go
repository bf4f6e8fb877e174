package systemtest

import (
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/storage/pgtest"
)

type replayResult struct {
	Target           string `json:"target"`
	EpisodesReplayed int64  `json:"episodes_replayed"`
	Steps            int64  `json:"steps"`
	Updates          int64  `json:"updates"`
	Revision         int64  `json:"revision"`
}

// referenceFrom is the plainest reading of the update rule, from a given
// initial value: episodes in order, returns from the last step back, one
// constant-step update per (first) visit.
func referenceFrom(episodes []episodeJSON, gamma, alpha, initial float64, firstVisit bool) map[pair]estimate {
	table := map[pair]estimate{}
	for _, ep := range episodes {
		g := 0.0
		for t := len(ep.Steps) - 1; t >= 0; t-- {
			st := ep.Steps[t]
			g = gamma*g + st.Reward
			k := pair{st.State, st.Action}
			if firstVisit && firstIndex(ep, k) < t {
				continue
			}
			e, ok := table[k]
			if !ok {
				e.q = initial
			}
			e.q += alpha * (g - e.q)
			e.visits++
			table[k] = e
		}
	}
	return table
}

func exportedTable(s *service, policy string) map[pair]estimate {
	out := map[pair]estimate{}
	for _, r := range s.export("/v1/policies/" + policy + "/table").Rows {
		out[pair{r.State, r.Action}] = estimate{r.Q, r.Visits}
	}
	return out
}

// A replay trains a new policy from another's stored episodes with other
// settings, in the background, and ends with exactly the table that
// sequential updates with those settings give; the two policies can then
// be compared by diff and by evaluation.
func TestReplayTrainsANewPolicyWithOtherSettings(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t), "serve", "--batch-episodes", "9")
	actions := []string{"retry", "wait", "remind"}
	s.call("PUT", "/v1/policies/dunning", map[string]any{"actions": actions, "gamma": 0.9, "alpha": 0.1, "epsilon": 0.2}, 201)
	rng := rand.New(rand.NewPCG(31, 32))
	var all []episodeJSON
	for b := range 4 {
		batch := randomBatch(rng, fmt.Sprintf("b%d", b), 15, actions)
		s.post("dunning", batch...)
		all = append(all, batch...)
	}
	s.waitTrained("dunning", int64(len(all)))
	source := exportedTable(s, "dunning")

	job, seen := startJob[replayResult](s, "/v1/policies/dunning/replays",
		map[string]any{"target": "dunning-eager", "alpha": 0.4, "gamma": 0.8, "visit": "every", "initial_q": 1.5}, 30*time.Second)
	if job.Status != "succeeded" || job.Result.Target != "dunning-eager" || job.Result.EpisodesReplayed != int64(len(all)) {
		t.Fatalf("replay: %s %s %+v", job.Status, job.Error, job.Result)
	}
	if last := seen[len(seen)-1]; last.Done != int64(len(all)) || last.Total != int64(len(all)) {
		t.Fatalf("final progress %+v", last)
	}
	var settings struct {
		Actions  []string `json:"actions"`
		Alpha    float64  `json:"alpha"`
		Gamma    float64  `json:"gamma"`
		Epsilon  float64  `json:"epsilon"`
		Visit    string   `json:"visit"`
		InitialQ float64  `json:"initial_q"`
		Backlog  int64    `json:"backlog"`
		Episodes int64    `json:"episodes"`
		Revision int64    `json:"revision"`
	}
	s.call("GET", "/v1/policies/dunning-eager", nil, 200).decode(t, &settings)
	if fmt.Sprint(settings.Actions) != fmt.Sprint(actions) || settings.Alpha != 0.4 || settings.Gamma != 0.8 || settings.Epsilon != 0.2 ||
		settings.Visit != "every" || settings.InitialQ != 1.5 || settings.Episodes != 0 || settings.Revision != job.Result.Revision {
		t.Fatalf("target policy: %+v", settings)
	}
	want := referenceFrom(all, 0.8, 0.4, 1.5, false)
	got := exportedTable(s, "dunning-eager")
	if len(got) != len(want) {
		t.Fatalf("replayed %d pairs, reference %d", len(got), len(want))
	}
	for k, w := range want {
		if g := got[k]; math.Abs(g.q-w.q) > 1e-9 || g.visits != w.visits {
			t.Fatalf("pair %v: replayed Q=%v N=%d, reference Q=%v N=%d", k, g.q, g.visits, w.q, w.visits)
		}
	}
	if after := exportedTable(s, "dunning"); fmt.Sprint(after) != fmt.Sprint(source) {
		t.Fatal("the replay changed the source's table")
	}

	// Compare the two: by greedy actions, and by evaluating the new
	// policy's greedy policy on the source's history.
	var diff struct {
		StatesCompared int    `json:"states_compared"`
		To             string `json:"to"`
	}
	s.call("GET", "/v1/policies/dunning/diff?to_policy=dunning-eager", nil, 200).decode(t, &diff)
	if diff.StatesCompared != 6 || diff.To != "dunning-eager/live" {
		t.Fatalf("diff: %+v", diff)
	}
	eval, _ := startJob[evaluationResult](s, "/v1/policies/dunning/evaluations",
		map[string]any{"target": map[string]any{"policy": "dunning-eager", "mode": "explore", "epsilon": 0.3}, "seed": 3}, 30*time.Second)
	if eval.Status != "succeeded" || eval.Result.EpisodesUsed != int64(len(all)) {
		t.Fatalf("evaluation of the replayed policy: %s %s %+v", eval.Status, eval.Error, eval.Result)
	}

	// A window replays only its episodes.
	job, _ = startJob[replayResult](s, "/v1/policies/dunning/replays",
		map[string]any{"target": "dunning-recent", "window": map[string]any{"last": 10}}, 30*time.Second)
	if job.Status != "succeeded" || job.Result.EpisodesReplayed != 10 {
		t.Fatalf("windowed replay: %s %+v", job.Status, job.Result)
	}
	want = referenceFrom(all[len(all)-10:], 0.9, 0.1, 0, true)
	got = exportedTable(s, "dunning-recent")
	for k, w := range want {
		if g := got[k]; len(got) != len(want) || math.Abs(g.q-w.q) > 1e-9 || g.visits != w.visits {
			t.Fatalf("windowed replay: pair %v Q=%v N=%d, reference Q=%v N=%d (%d pairs vs %d)", k, g.q, g.visits, w.q, w.visits, len(got), len(want))
		}
	}

	r := s.call("POST", "/v1/policies/dunning/replays", map[string]any{"target": "dunning-eager"}, 409)
	if !strings.Contains(string(r.Body), "exists already") {
		t.Fatalf("replay into an existing policy: %s", r.Body)
	}
	s.call("POST", "/v1/policies/dunning/replays", map[string]any{"target": "dunning"}, 400)
	r = s.send("POST", "/v1/policies/dunning/replays", "application/json", []byte(`{"target": "x", "alpha": 2}`), true)
	if r.Status != 400 || !strings.Contains(string(r.Body), `"alpha"`) {
		t.Fatalf("bad alpha: %d %s", r.Status, r.Body)
	}
	s.call("POST", "/v1/policies/nobody/replays", map[string]any{"target": "x"}, 404)
	s.call("GET", "/v1/policies/nobody/replays/1", nil, 404)
	s.call("GET", "/v1/policies/dunning-eager", nil, 200)
	s.call("GET", "/v1/policies/x", nil, 404) // refused replays created nothing
}
