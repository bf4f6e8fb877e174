package systemtest

import (
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"net/http"
	"strings"
	"testing"
)

type chosen struct {
	Action       string  `json:"action"`
	Probability  float64 `json:"probability"`
	GreedyAction string  `json:"greedy_action"`
	KnownState   bool    `json:"known_state"`
	Revision     int64   `json:"revision"`
}

func (s *service) choose(policy, state string) chosen {
	var c chosen
	s.call("POST", "/v1/policies/"+policy+"/choose", map[string]any{"state": state, "mode": "greedy"}, 200).decode(s.t, &c)
	return c
}

func (s *service) post(policy string, eps ...episodeJSON) {
	s.call("POST", "/v1/policies/"+policy+"/episodes", map[string]any{"episodes": eps}, 202)
}

func oneStep(id, state, action string, reward float64) episodeJSON {
	return episodeJSON{ID: id, Steps: []stepJSON{{State: state, Action: action, Reward: reward}}}
}

type stepJSON struct {
	State       string   `json:"state"`
	Action      string   `json:"action"`
	Reward      float64  `json:"reward"`
	Probability *float64 `json:"probability,omitempty"`
}

type episodeJSON struct {
	ID    string     `json:"id"`
	Steps []stepJSON `json:"steps"`
}

type pair struct{ state, action string }

type estimate struct {
	q      float64
	visits int64
}

// sequentialReference is the plainest reading of the update rule: one
// episode after another in arrival order, returns G <- gamma G + r from the
// last step back, Q <- Q + alpha (G - Q) at each (first) visit.
func sequentialReference(episodes []episodeJSON, gamma, alpha float64, firstVisit bool, table map[pair]estimate) {
	for _, ep := range episodes {
		g := 0.0
		for t := len(ep.Steps) - 1; t >= 0; t-- {
			st := ep.Steps[t]
			g = gamma*g + st.Reward
			k := pair{st.State, st.Action}
			if firstVisit && firstIndex(ep, k) < t {
				continue
			}
			e := table[k]
			e.q += alpha * (g - e.q)
			e.visits++
			table[k] = e
		}
	}
}

func firstIndex(ep episodeJSON, k pair) int {
	for i, st := range ep.Steps {
		if st.State == k.state && st.Action == k.action {
			return i
		}
	}
	return -1
}

// randomBatch makes episodes over few states and actions, so that pairs
// repeat within episodes and across them.
func randomBatch(rng *rand.Rand, prefix string, n int, actions []string) []episodeJSON {
	eps := make([]episodeJSON, n)
	for i := range eps {
		steps := make([]stepJSON, 1+rng.IntN(15))
		for j := range steps {
			p := 0.1 + 0.9*rng.Float64()
			steps[j] = stepJSON{
				State:       fmt.Sprintf("day %d/bucket", rng.IntN(6)),
				Action:      actions[rng.IntN(len(actions))],
				Reward:      math.Round(rng.NormFloat64()*1000) / 100,
				Probability: &p,
			}
		}
		eps[i] = episodeJSON{ID: fmt.Sprintf("%s-%d", prefix, i), Steps: steps}
	}
	return eps
}

func ndjson(t testing.TB, eps []episodeJSON) []byte {
	var b strings.Builder
	for _, ep := range eps {
		b.Write(must(json.Marshal(ep)))
		b.WriteByte('\n')
	}
	return []byte(b.String())
}

func compareTables(t testing.TB, got, want map[pair]estimate) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("service has %d learned pairs, reference %d", len(got), len(want))
	}
	for k, w := range want {
		g := got[k]
		if math.Abs(g.q-w.q) > 1e-9 || g.visits != w.visits {
			t.Fatalf("pair %v: service Q=%v N=%d, sequential reference Q=%v N=%d", k, g.q, g.visits, w.q, w.visits)
		}
	}
}

// policySpec is a policy of a fault test and the settings its reference
// computation needs.
type policySpec struct {
	name         string
	gamma, alpha float64
	visit        string
}

func (ps policySpec) create(s *service) {
	s.call("PUT", "/v1/policies/"+ps.name, map[string]any{"actions": faultActions, "gamma": ps.gamma, "alpha": ps.alpha, "visit": ps.visit}, 201)
}

// choice is the part of a choose answer the fault tests look at.
type choice struct {
	Action   string  `json:"action"`
	Revision int64   `json:"revision"`
	CopyAge  float64 `json:"copy_age_seconds"`
}

// choose asks for an action, exploring so that a state not trained yet has
// an answer too; anything but 200 is an error.
func choose(client *http.Client, baseURL, policy, state string) (choice, error) {
	body := must(json.Marshal(map[string]any{"state": state, "mode": "explore"}))
	resp, err := client.Post(baseURL+"/v1/policies/"+policy+"/choose", "application/json", bytes.NewReader(body))
	if err != nil {
		return choice{}, fmt.Errorf("choose: %w", err)
	}
	defer resp.Body.Close()
	data, _ := io.ReadAll(resp.Body)
	var c choice
	if resp.StatusCode != http.StatusOK {
		return c, fmt.Errorf("choose: %d %s", resp.StatusCode, data)
	}
	if err := json.Unmarshal(data, &c); err != nil {
		return c, fmt.Errorf("choose: %w: %s", err, data)
	}
	return c, nil
}
