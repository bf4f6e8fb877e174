package systemtest

import (
	"strings"
	"testing"

	"github.com/qtally/qtally/storage/pgtest"
)

// A policy that declares the shape of its states refuses states that do
// not fit it, in episodes and in choose, naming the episode, step and the
// state's field; a policy may also require a probability on every step.
func TestStatesMustFitThePolicysShape(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	const base = "/v1/policies/renewals"
	shape := map[string]any{"fields": []map[string]any{
		{"name": "day", "min": 0, "max": 30},
		{"name": "reason", "values": []string{"low_balance", "card_out_of_date", "bank_refused"}},
	}}
	s.call("PUT", base, map[string]any{"actions": []string{"retry_card", "wait"}, "state_shape": shape, "require_probability": true}, 201)
	p := 0.5
	ok := stepJSON{State: "day=3|reason=low_balance", Action: "wait", Reward: 0, Probability: &p}
	s.call("POST", base+"/episodes", map[string]any{"episodes": []episodeJSON{{ID: "a", Steps: []stepJSON{ok}}}}, 202)

	for _, tc := range []struct {
		name  string
		step  stepJSON
		field string
		want  string
	}{
		{"out of range", stepJSON{State: "day=31|reason=low_balance", Action: "wait", Probability: &p}, "state", `\"day\"`},
		{"not a number", stepJSON{State: "day=three|reason=low_balance", Action: "wait", Probability: &p}, "state", "integer from 0 to 30"},
		{"a value not listed", stepJSON{State: "day=3|reason=jane.doe@example.com", Action: "wait", Probability: &p}, "state", `\"reason\"`},
		{"a field missing", stepJSON{State: "day=3", Action: "wait", Probability: &p}, "state", `\"reason\"`},
		{"fields out of order", stepJSON{State: "reason=low_balance|day=3", Action: "wait", Probability: &p}, "state", `\"day\"`},
		{"a field too many", stepJSON{State: "day=3|reason=low_balance|email=x", Action: "wait", Probability: &p}, "state", "2 fields"},
		{"no probability", stepJSON{State: "day=3|reason=low_balance", Action: "wait"}, "probability", "require_probability"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			r := s.call("POST", base+"/episodes", map[string]any{"episodes": []episodeJSON{
				{ID: "b", Steps: []stepJSON{ok}},
				{ID: "c", Steps: []stepJSON{ok, tc.step}},
			}}, 400)
			body := string(r.Body)
			for _, want := range []string{`"episode":1`, `"step":1`, `"field":"` + tc.field + `"`, tc.want} {
				if !strings.Contains(body, want) {
					t.Errorf("400 lacks %s: %s", want, body)
				}
			}
			if tc.field == "state" {
				r := s.call("POST", base+"/choose", map[string]any{"state": tc.step.State, "mode": "explore"}, 400)
				if !strings.Contains(string(r.Body), `"field":"state"`) || !strings.Contains(string(r.Body), tc.want) {
					t.Errorf("choose: %s", r.Body)
				}
			}
		})
	}
	if st := s.status("renewals"); st.Episodes != 1 {
		t.Fatalf("%d episodes stored, want 1", st.Episodes)
	}
	s.call("POST", base+"/choose", map[string]any{"state": "day=30|reason=bank_refused", "mode": "explore"}, 200)

	// A shape that cannot be met is refused, naming its part.
	r := s.patch(base, `{"state_shape":{"fields":[{"name":"day","min":5,"max":1}]}}`, 400)
	if !strings.Contains(string(r.Body), `"field":"state_shape.fields[0]"`) {
		t.Fatalf("bad shape: %s", r.Body)
	}
	// Without a shape any state goes again.
	s.patch(base, `{"state_shape":null,"require_probability":false}`, 200)
	s.call("POST", base+"/episodes", map[string]any{"episodes": []episodeJSON{{ID: "d", Steps: []stepJSON{{State: "anything", Action: "wait"}}}}}, 202)
}
