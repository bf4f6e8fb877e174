package systemtest

import (
	"encoding/json"
	"slices"
	"strings"
	"testing"

	"github.com/qtally/qtally/storage/pgtest"
)

type refusal struct {
	Errors []struct {
		Episode *int   `json:"episode"`
		Step    *int   `json:"step"`
		Field   string `json:"field"`
		Message string `json:"message"`
	} `json:"errors"`
}

// where renders a problem's location as "episode/step/field", -1 where absent.
func (r refusal) where() []string {
	var out []string
	for _, e := range r.Errors {
		ep, st := -1, -1
		if e.Episode != nil {
			ep = *e.Episode
		}
		if e.Step != nil {
			st = *e.Step
		}
		out = append(out, strings.Join([]string{itoa(ep), itoa(st), e.Field}, "/"))
	}
	return out
}

func itoa(i int) string { return strings.TrimSpace(string(must(json.Marshal(i)))) }

// Bodies in the wrong shape get a hint saying what shape was expected, and
// a batch with a type error lists every other problem too, each once, with
// its episode, step and field; nothing of a refused batch is stored.
func TestEpisodeRefusalsHintAndListEveryProblem(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	const path = "/v1/policies/routing/episodes"
	s.call("PUT", "/v1/policies/routing", map[string]any{"actions": []string{"truck", "drone"}}, 201)
	const js, nd = "application/json", "application/x-ndjson"
	one := `{"id":"e1","steps":[{"state":"rain","action":"truck","reward":1}]}`
	two := `{"id":"e2","steps":[{"state":"dry","action":"drone","reward":2}]}`

	for _, c := range []struct {
		name, ctype, body string
		want              []string
	}{
		{"a bare episode as JSON", js, one, []string{`one episode`, `{\"episodes\": [`, "application/x-ndjson"}},
		{"a bare episode with an unknown field", js, `{"id":"e1","steps":[],"note":"x"}`, []string{`one episode`, `{\"episodes\": [`}},
		{"NDJSON sent as JSON", js, one + "\n" + two + "\n", []string{"2 JSON values, one a line", "Content-Type: application/x-ndjson"}},
		{"an array of episodes", js, "[" + one + "," + two + "]", []string{"a JSON array", `{\"episodes\": [`}},
		{"a JSON batch sent as NDJSON", nd, `{"episodes":[` + one + `]}`, []string{`{\"episodes\": [...]}`, "Content-Type: application/json"}},
		{"a pretty-printed JSON batch sent as NDJSON", nd, "{\n  \"episodes\": [" + one + "]\n}\n", []string{"Content-Type: application/json"}},
	} {
		t.Run(c.name, func(t *testing.T) {
			r := s.send("POST", path, c.ctype, []byte(c.body), true)
			if r.Status != 400 {
				t.Fatalf("%d %s, want 400", r.Status, r.Body)
			}
			for _, w := range c.want {
				if !strings.Contains(string(r.Body), w) {
					t.Errorf("%s\nlacks %q", r.Body, w)
				}
			}
		})
	}

	// Type errors in episodes 0 and 2, a policy problem in 1 and 3, a
	// decoding and a policy problem in 4, one valid episode (5).
	batch := `{"episodes":[
		{"id":"a","steps":[{"state":"s","action":"truck","reward":1},{"state":"s","action":"truck","reward":"1"}]},
		{"id":"b","steps":[{"state":"s","action":"fax","reward":1}]},
		{"id":42,"steps":[{"state":"s","action":"truck","reward":1}]},
		{"id":"d","steps":[{"state":"bell\u0007","action":"drone","reward":1,"probability":2}]},
		{"id":"e","steps":[{"state":"s","action":7,"reward":1,"rewrd":2},{"state":"s","action":"boat","reward":1}]},
		{"id":"f","steps":[{"state":"s","action":"truck","reward":1}]}
	]}`
	var got refusal
	r := s.send("POST", path, js, []byte(batch), true)
	if r.Status != 400 {
		t.Fatalf("mixed batch: %d %s", r.Status, r.Body)
	}
	r.decode(t, &got)
	want := []string{"0/1/reward", "1/0/action", "2/-1/id", "3/0/state", "3/0/probability", "4/0/action", "4/0/rewrd", "4/1/action"}
	where := got.where()
	for _, w := range want {
		if !slices.Contains(where, w) {
			t.Errorf("the refusal lacks a problem at %s: %s", w, r.Body)
		}
	}
	if len(where) != len(want) {
		t.Errorf("the refusal lists %d problems %q, want each of %q once: %s", len(where), where, want, r.Body)
	}
	for _, e := range got.Errors {
		if strings.Contains(e.Message, "is missing") {
			t.Errorf("a field that did not decode is also reported missing: %+v", e)
		}
	}

	// NDJSON: every line is decoded, not only up to the first bad one.
	lines := strings.Join([]string{
		`{"id":"n0","steps":[{"state":"s","action":"truck","reward":"high"}]}`,
		two,
		`{"id":"n2","steps":[{"state":"s","action":"truck","reward":1}],"extra":1}`,
		`{"id":"n3","steps":[{"state":"s","action":"ship","reward":1}]}`,
	}, "\n")
	got = refusal{}
	r = s.send("POST", path, nd, []byte(lines), true)
	if r.Status != 400 {
		t.Fatalf("NDJSON batch: %d %s", r.Status, r.Body)
	}
	r.decode(t, &got)
	if where, want := got.where(), []string{"0/0/reward", "2/-1/extra", "3/0/action"}; !slices.Equal(where, want) {
		t.Errorf("NDJSON refusal at %q, want %q: %s", where, want, r.Body)
	}

	// A body of nothing but problems gets a bounded answer that says so.
	badLine := `{"id":"x","steps":[{"state":"s","action":"truck","reward":"r"}]}` + "\n"
	for _, body := range []struct{ ctype, body string }{
		{nd, strings.Repeat(badLine, 5000)},
		{js, `{"episodes":[` + strings.TrimSuffix(strings.Repeat(strings.TrimSpace(badLine)+",", 5000), ",") + `]}`},
		{js, `{"episodes":[{"id":"x","steps":[{` + strings.TrimSuffix(strings.Repeat(`"k":1,`, 5000), ",") + `}]}]}`},
	} {
		got = refusal{}
		r = s.send("POST", path, body.ctype, []byte(body.body), true)
		if r.Status != 400 {
			t.Fatalf("all problems: %d %.300s", r.Status, r.Body)
		}
		r.decode(t, &got)
		if n := len(got.Errors); n < 100 || n > 101 || !strings.Contains(string(r.Body), "decoding stopped after 100 problems") {
			t.Errorf("a body of problems: %d problems listed, want 100 and where decoding stopped: %.500s", n, r.Body)
		}
	}

	var st struct {
		Episodes int64 `json:"episodes"`
	}
	s.call("GET", "/v1/policies/routing", nil, 200).decode(t, &st)
	if st.Episodes != 0 {
		t.Fatalf("refused batches stored %d episodes", st.Episodes)
	}
}
