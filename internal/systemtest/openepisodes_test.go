package systemtest

import (
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"net/http"
	"slices"
	"strconv"
	"strings"
	"sync"
	"testing"

	"github.com/qtally/qtally/storage/pgtest"
)

type recordedAnswer struct {
	Action       string   `json:"action"`
	Probability  float64  `json:"probability"`
	Explored     bool     `json:"explored"`
	GreedyAction string   `json:"greedy_action"`
	Allowed      []string `json:"allowed"`
	Revision     int64    `json:"revision"`
	Episode      string   `json:"episode"`
	Step         int      `json:"step"`
	Repeated     bool     `json:"repeated"`
}

// same reports whether two answers gave the same decision.
func (a recordedAnswer) same(b recordedAnswer) bool {
	sa, sb := slices.Clone(a.Allowed), slices.Clone(b.Allowed)
	slices.Sort(sa)
	slices.Sort(sb)
	return a.Action == b.Action && a.Probability == b.Probability && a.Explored == b.Explored &&
		a.GreedyAction == b.GreedyAction && a.Revision == b.Revision && slices.Equal(sa, sb)
}

func (s *service) chooseIn(policy, episode string, step int, state string, allowed ...string) reply {
	body := map[string]any{"state": state, "mode": "explore", "episode": episode, "step": step}
	if allowed != nil {
		body["allowed"] = allowed
	}
	return s.send("POST", "/v1/policies/"+policy+"/choose", "application/json", must(json.Marshal(body)), false)
}

func (s *service) record(policy, episode string, step int, state string, allowed ...string) recordedAnswer {
	s.t.Helper()
	r := s.chooseIn(policy, episode, step, state, allowed...)
	if r.Status != 200 {
		s.t.Fatalf("recorded choose %s step %d: %d %s", episode, step, r.Status, r.Body)
	}
	var a recordedAnswer
	r.decode(s.t, &a)
	return a
}

type openEpisodeJSON struct {
	ID    string `json:"id"`
	Steps []struct {
		Step        int      `json:"step"`
		State       string   `json:"state"`
		Action      string   `json:"action"`
		Probability float64  `json:"probability"`
		Allowed     []string `json:"allowed"`
		Reward      float64  `json:"reward"`
	} `json:"steps"`
}

// A decision recorded, retried, refused out of order, rewarded and ended:
// the ended episode is stored once with every decision's probability and
// allowed set, and learned exactly as the same episode posted would be.
func TestOpenEpisodeRecordsRetriesAndEnds(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t), "serve", "--batch-episodes", "5")
	actions := []string{"call", "mail", "wait"}
	s.call("PUT", "/v1/policies/renewals", map[string]any{"actions": actions, "gamma": 0.9, "alpha": 0.5, "epsilon": 0.5}, 201)

	first := s.record("renewals", "cust-7", 0, "day 0", "call", "mail")
	if first.Repeated || first.Episode != "cust-7" || first.Step != 0 || !slices.Equal(first.Allowed, []string{"call", "mail"}) {
		t.Fatalf("first decision: %+v", first)
	}
	// Retries answer the recorded decision, however often they are sent.
	for range 3 {
		again := s.record("renewals", "cust-7", 0, "day 0", "call", "mail")
		if !again.Repeated || !again.same(first) {
			t.Fatalf("retry of step 0 answered %+v, recorded %+v", again, first)
		}
	}
	refusals := []struct {
		step  int
		state string
		says  string
	}{
		{2, "day 1", "the next is step 1; this request names step 2"},
		{0, "day 9", `step 0 of episode \"cust-7\" was recorded in state \"day 0\"; this request names state \"day 9\"`},
	}
	for _, c := range refusals {
		r := s.chooseIn("renewals", "cust-7", c.step, c.state)
		if r.Status != http.StatusConflict || !strings.Contains(string(r.Body), c.says) {
			t.Fatalf("step %d in %q: %d %s, want 409 saying %q", c.step, c.state, r.Status, r.Body, c.says)
		}
	}
	if r := s.chooseIn("renewals", "cust-8", 1, "day 1"); r.Status != http.StatusConflict || !strings.Contains(string(r.Body), "must name step 0 to open it") {
		t.Fatalf("first decision numbered 1: %d %s", r.Status, r.Body)
	}
	second := s.record("renewals", "cust-7", 1, "day 1")

	// Rewards: to the latest decision, to a named one, summed; a key makes
	// a retried addition count once.
	s.call("POST", "/v1/policies/renewals/open-episodes/cust-7/rewards", map[string]any{"reward": 2}, 200)
	s.call("POST", "/v1/policies/renewals/open-episodes/cust-7/rewards", map[string]any{"reward": 0.5}, 200)
	for range 2 {
		s.call("POST", "/v1/policies/renewals/open-episodes/cust-7/rewards", map[string]any{"reward": -1, "step": 0, "key": "fee-1"}, 200)
	}
	var res struct {
		Reward   float64 `json:"reward"`
		Repeated bool    `json:"repeated"`
	}
	s.call("POST", "/v1/policies/renewals/open-episodes/cust-7/rewards", map[string]any{"reward": -1, "step": 0, "key": "fee-1"}, 200).decode(t, &res)
	if !res.Repeated || res.Reward != -1 {
		t.Fatalf("keyed reward sent three times: %+v, want repeated with the sum -1", res)
	}
	if r := s.send("POST", "/v1/policies/renewals/open-episodes/cust-7/rewards", "application/json", []byte(`{"reward":1,"step":5}`), false); r.Status != 400 || !strings.Contains(string(r.Body), "there is no step 5") {
		t.Fatalf("reward to step 5 of 2: %d %s", r.Status, r.Body)
	}
	var open openEpisodeJSON
	s.call("GET", "/v1/policies/renewals/open-episodes/cust-7", nil, 200).decode(t, &open)
	if len(open.Steps) != 2 || open.Steps[0].Reward != -1 || open.Steps[1].Reward != 2.5 ||
		open.Steps[0].Action != first.Action || open.Steps[1].Probability != second.Probability {
		t.Fatalf("open episode reads %+v", open)
	}

	// Posting under the open id is refused, naming the episode and field.
	r := s.send("POST", "/v1/policies/renewals/episodes", "application/json",
		must(json.Marshal(map[string]any{"episodes": []episodeJSON{oneStep("other", "day 0", "call", 1), oneStep("cust-7", "day 0", "call", 1)}})), false)
	if r.Status != 400 || !strings.Contains(string(r.Body), `"episode":1`) || !strings.Contains(string(r.Body), "keeps open") {
		t.Fatalf("posting an open id: %d %s", r.Status, r.Body)
	}

	var ended struct {
		Steps        int     `json:"steps"`
		Return       float64 `json:"return"`
		AlreadyEnded bool    `json:"already_ended"`
	}
	s.call("POST", "/v1/policies/renewals/open-episodes/cust-7/end", map[string]any{"reward": 3}, 200).decode(t, &ended)
	if ended.Steps != 2 || ended.Return != 4.5 || ended.AlreadyEnded {
		t.Fatalf("end: %+v, want 2 steps returning -1 + 2.5 + 3", ended)
	}
	s.call("POST", "/v1/policies/renewals/open-episodes/cust-7/end", map[string]any{"reward": 100}, 200).decode(t, &ended)
	if !ended.AlreadyEnded || ended.Return != 4.5 {
		t.Fatalf("ending again: %+v, want already ended and nothing added", ended)
	}
	s.call("GET", "/v1/policies/renewals/open-episodes/cust-7", nil, 404)
	if r := s.chooseIn("renewals", "cust-7", 2, "day 2"); r.Status != http.StatusConflict || !strings.Contains(string(r.Body), "stored as a finished episode") {
		t.Fatalf("deciding in an ended episode: %d %s", r.Status, r.Body)
	}
	// And an id a posted episode has is never opened.
	s.post("renewals", oneStep("posted-1", "day 0", "wait", 1))
	if r := s.chooseIn("renewals", "posted-1", 0, "day 0"); r.Status != http.StatusConflict {
		t.Fatalf("opening a posted id: %d %s", r.Status, r.Body)
	}

	stored := storedEpisodes(t, s.databaseURL, "renewals")
	if len(stored) != 2 || stored[0].id != "cust-7" {
		t.Fatalf("stored %+v, want cust-7 then posted-1", stored)
	}
	e := stored[0]
	// One byte a step for three actions: bit i is action i.
	if !slices.Equal(e.states, []string{"day 0", "day 1"}) || !slices.Equal(e.rewards, []float64{-1, 5.5}) ||
		!slices.Equal(e.probabilities, []float64{first.Probability, second.Probability}) || !slices.Equal(e.allowed, []byte{0b011, 0b111}) ||
		actions[e.actions[0]] != first.Action || actions[e.actions[1]] != second.Action {
		t.Fatalf("stored episode %+v, from decisions %+v and %+v", e, first, second)
	}
	s.waitTrained("renewals", 2)
	reference := map[pair]estimate{}
	sequentialReference([]episodeJSON{
		{ID: "cust-7", Steps: []stepJSON{{State: "day 0", Action: first.Action, Reward: -1}, {State: "day 1", Action: second.Action, Reward: 5.5}}},
		oneStep("posted-1", "day 0", "wait", 1),
	}, 0.9, 0.5, true, reference)
	compareTables(t, s.table("renewals", []string{"day 0", "day 1"}), reference)
}

// Ended episodes take their place in the training order when they end,
// among posted ones: the table equals a sequential replay in that order.
func TestOpenEpisodesTrainInTheOrderTheyEnd(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t), "serve", "--batch-episodes", "3")
	actions := []string{"call", "mail", "wait"}
	s.call("PUT", "/v1/policies/dunning", map[string]any{"actions": actions, "gamma": 0.8, "alpha": 0.3, "epsilon": 0.6}, 201)
	rng := rand.New(rand.NewPCG(4, 2))
	const episodes = 12
	trajectories := make([]episodeJSON, episodes)
	for i := range trajectories {
		trajectories[i].ID = fmt.Sprintf("acct-%d", i)
	}
	// Decisions interleave across episodes; rewards arrive between them.
	for round := range 4 {
		for i := range trajectories {
			if rng.IntN(3) == 0 && round > 0 {
				continue
			}
			ep := &trajectories[i]
			state := fmt.Sprintf("stage %d", rng.IntN(3))
			a := s.record("dunning", ep.ID, len(ep.Steps), state)
			reward := float64(rng.IntN(7) - 3)
			s.call("POST", "/v1/policies/dunning/open-episodes/"+ep.ID+"/rewards", map[string]any{"reward": reward}, 200)
			ep.Steps = append(ep.Steps, stepJSON{State: state, Action: a.Action, Reward: reward})
		}
	}
	var order []episodeJSON
	for n, i := range rng.Perm(episodes) {
		s.call("POST", "/v1/policies/dunning/open-episodes/"+trajectories[i].ID+"/end", nil, 200)
		order = append(order, trajectories[i])
		if n%4 == 0 {
			posted := randomBatch(rng, fmt.Sprintf("posted-%d", n), 2, actions)
			for j := range posted {
				posted[j].Steps[0].State = "stage 1"
				posted[j].Steps = posted[j].Steps[:1]
			}
			s.post("dunning", posted...)
			order = append(order, posted...)
		}
	}
	stored := storedEpisodes(t, s.databaseURL, "dunning")
	if len(stored) != len(order) {
		t.Fatalf("%d stored, %d ended or posted", len(stored), len(order))
	}
	for i, e := range stored {
		if e.id != order[i].ID {
			t.Fatalf("stored #%d is %s, ended or posted #%d was %s", i, e.id, i, order[i].ID)
		}
	}
	s.waitTrained("dunning", int64(len(order)))
	reference := map[pair]estimate{}
	sequentialReference(order, 0.8, 0.3, true, reference)
	compareTables(t, s.table("dunning", []string{"stage 0", "stage 1", "stage 2"}), reference)
}

// Many clients record at once, each sending every decision twice
// concurrently (a client that retries before its first answer): each step
// is stored once, both copies get the same answer, and the group commit
// put several decisions in one commit.
func TestConcurrentRecordedChoosesShareCommits(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	s.call("PUT", "/v1/policies/offers", map[string]any{"actions": []string{"a", "b", "c", "d"}, "epsilon": 0.9}, 201)
	const clients, steps = 16, 6
	var wg sync.WaitGroup
	var mu sync.Mutex
	var failures []string
	for c := range clients {
		wg.Go(func() {
			ep := fmt.Sprintf("client-%d", c)
			for step := range steps {
				var answers [2]recordedAnswer
				var codes [2]int
				var pair sync.WaitGroup
				for k := range 2 {
					pair.Go(func() {
						r := s.chooseIn("offers", ep, step, fmt.Sprintf("s%d", step%3))
						codes[k] = r.Status
						if r.Status == 200 {
							r.decode(t, &answers[k])
						}
					})
				}
				pair.Wait()
				if codes != [2]int{200, 200} || !answers[0].same(answers[1]) || answers[0].Repeated == answers[1].Repeated {
					mu.Lock()
					failures = append(failures, fmt.Sprintf("%s step %d: %v %+v", ep, step, codes, answers))
					mu.Unlock()
				}
			}
		})
	}
	wg.Wait()
	if len(failures) > 0 {
		t.Fatalf("%d failures, first: %s", len(failures), failures[0])
	}
	for c := range clients {
		var open openEpisodeJSON
		s.call("GET", fmt.Sprintf("/v1/policies/offers/open-episodes/client-%d", c), nil, 200).decode(t, &open)
		if len(open.Steps) != steps {
			t.Fatalf("client-%d has %d steps recorded, want %d", c, len(open.Steps), steps)
		}
	}
	metrics := string(s.call("GET", "/metrics", nil, 200).Body)
	if !strings.Contains(metrics, fmt.Sprintf(`qtally_decisions_recorded_total{policy="offers"} %d`, clients*steps)) ||
		!strings.Contains(metrics, fmt.Sprintf(`qtally_decisions_repeated_total{policy="offers"} %d`, clients*steps)) {
		t.Fatalf("metrics do not count %d recorded and %d repeated:\n%s", clients*steps, clients*steps, grepLines(metrics, "qtally_decision"))
	}
	var commits float64
	for _, l := range strings.Split(metrics, "\n") {
		if v, ok := strings.CutPrefix(l, "qtally_decision_batch_size_count "); ok {
			commits = must(strconv.ParseFloat(v, 64))
		}
	}
	if commits == 0 || commits >= 2*clients*steps {
		t.Fatalf("%v group commits for %d requests: want fewer commits than requests", commits, 2*clients*steps)
	}
	t.Logf("%d recorded chooses in %v group commits", 2*clients*steps, commits)
}

// Limits on open episodes and on steps are refused with 409 saying which.
func TestOpenEpisodeLimits(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	s.call("PUT", "/v1/policies/small", map[string]any{"actions": []string{"a", "b"}, "max_open_episodes": 2, "max_open_episode_steps": 2}, 201)
	s.record("small", "e1", 0, "x")
	s.record("small", "e1", 1, "x")
	if r := s.chooseIn("small", "e1", 2, "x"); r.Status != 409 || !strings.Contains(string(r.Body), "max_open_episode_steps") {
		t.Fatalf("third step of two allowed: %d %s", r.Status, r.Body)
	}
	s.record("small", "e2", 0, "x")
	if r := s.chooseIn("small", "e3", 0, "x"); r.Status != 409 || !strings.Contains(string(r.Body), "max_open_episodes") {
		t.Fatalf("third open episode of two allowed: %d %s", r.Status, r.Body)
	}
	s.call("POST", "/v1/policies/small/open-episodes/e1/end", nil, 200)
	s.record("small", "e3", 0, "x")
	if r := s.send("POST", "/v1/policies/small/choose", "application/json", []byte(`{"state":"x","step":0}`), false); r.Status != 400 || !strings.Contains(string(r.Body), "episode") {
		t.Fatalf("a step without an episode: %d %s", r.Status, r.Body)
	}
	if r := s.send("POST", "/v1/policies/small/choose", "application/json", []byte(`{"state":"x","episode":"e9"}`), false); r.Status != 400 || !strings.Contains(string(r.Body), "step") {
		t.Fatalf("an episode without a step: %d %s", r.Status, r.Body)
	}
}

// Housekeeping ends the idle episodes of a policy that says end (they are
// trained) and drops those of one that says drop (never trained); both
// are counted, and the status page shows them.
func TestIdleOpenEpisodesAreEndedOrDropped(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	for _, p := range []struct{ name, onIdle string }{{"patient", "end"}, {"strict", "drop"}} {
		s.call("PUT", "/v1/policies/"+p.name, map[string]any{"actions": []string{"a", "b"}, "open_episode_idle_limit": 0.5, "on_idle": p.onIdle}, 201)
		for i := range 3 {
			s.record(p.name, fmt.Sprintf("e%d", i), 0, "x")
		}
	}
	waitFor(t, patience, "idle episodes to be closed", func() bool {
		m := string(s.call("GET", "/metrics", nil, 200).Body)
		return strings.Contains(m, `qtally_open_episodes_closed_total{how="idle_ended",policy="patient"} 3`) &&
			strings.Contains(m, `qtally_open_episodes_closed_total{how="idle_dropped",policy="strict"} 3`)
	})
	s.waitTrained("patient", 3)
	if st := s.status("strict"); st.Episodes != 0 {
		t.Fatalf("dropped episodes were stored: %+v", st)
	}
	s.call("GET", "/v1/policies/strict/open-episodes/e0", nil, 404)
	m := string(s.call("GET", "/metrics", nil, 200).Body)
	for _, want := range []string{`qtally_open_episodes{policy="strict"} 0`, `qtally_open_episodes_closed_stored{how="idle_dropped",policy="strict"} 3`,
		`qtally_open_episodes_closed_stored{how="idle_ended",policy="patient"} 3`} {
		if !strings.Contains(m, want) {
			t.Fatalf("metrics lack %s:\n%s", want, grepLines(m, "qtally_open"))
		}
	}
	page := string(s.call("GET", "/policies/strict", nil, 200).Body)
	if !strings.Contains(page, `data-figure="open_dropped">3<`) {
		t.Fatalf("the status page does not show 3 dropped:\n%s", page)
	}
}
