package systemtest

import (
	"fmt"
	"net/url"
	"slices"
	"strings"
	"testing"

	"github.com/qtally/qtally/storage/pgtest"
)

// Malformed and hostile requests each get the right 4xx with a message that
// names the problem and where it is, and leave the database as it was.
func TestBadInputIsRefusedAndChangesNothing(t *testing.T) {
	t.Parallel()
	db := pgtest.NewDatabase(t)
	s := startService(t, db)
	const policy = "parcel-routing"
	base := "/v1/policies/" + policy
	s.call("PUT", base, map[string]any{"actions": []string{"truck", "drone"}, "alpha": 0.5}, 201)
	s.call("POST", base+"/episodes", map[string]any{"episodes": []episodeJSON{
		{ID: "seed-1", Steps: []stepJSON{{State: "rain/north", Action: "truck", Reward: 2}, {State: "dry/south", Action: "drone", Reward: 5}}},
		{ID: "seed-2", Steps: []stepJSON{{State: "rain/north", Action: "drone", Reward: -1}}},
	}}, 202)
	s.waitTrained(policy, 2)
	tables := []string{"policies", "episodes", "q_values", "api_tokens"}
	before := pgtest.Dump(t, db, tables...)
	if !strings.Contains(before, "seed-2") || strings.Count(before, "rain/north") < 3 {
		t.Fatalf("the starting data is not what the test expects:\n%s", before)
	}

	const js, nd = "application/json", "application/x-ndjson"
	step := func(fields string) string {
		return `{"episodes":[{"id":"e1","steps":[` + fields + `]}]}`
	}
	okStep := `{"state":"rain/north","action":"truck","reward":1}`
	nested := strings.Repeat("[", 20000) + strings.Repeat("]", 20000)
	manySteps := strings.TrimSuffix(strings.Repeat(okStep+",", 10001), ",")
	oversize := `{"episodes":[{"id":"big","steps":[{"state":"` + strings.Repeat("x", 17<<20) + `","action":"truck","reward":1}]}]}`

	cases := []struct {
		name         string
		method, path string
		ctype        string
		body         string
		status       int
		want         []string
	}{
		// Syntax.
		{"truncated JSON", "POST", base + "/episodes", js, `{"episodes":[{"id":"e1","steps":[{"state":"s"`, 400, []string{"truncated"}},
		{"invalid JSON", "POST", base + "/episodes", js, `{"episodes":[{"id":"e1",}]}`, 400, []string{"malformed JSON at byte offset 25"}},
		{"NaN literal", "POST", base + "/episodes", js, step(`{"state":"s","action":"truck","reward":NaN}`), 400, []string{"NaN", "not numbers in JSON", "byte offset 73"}},
		{"Infinity literal", "POST", base + "/episodes", js, step(`{"state":"s","action":"truck","reward":Infinity}`), 400, []string{"Infinity", "not numbers in JSON"}},
		{"-Infinity literal", "POST", base + "/episodes", js, step(`{"state":"s","action":"truck","reward":-Infinity}`), 400, []string{"Infinity", "not numbers in JSON"}},
		{"NDJSON NaN on the third line", "POST", base + "/episodes", nd, `{"id":"n1","steps":[` + okStep + `]}` + "\n" + `{"id":"n2","steps":[` + okStep + `]}` + "\n" + `{"id":"n3","steps":[{"state":"s","action":"truck","reward":nan}]}`, 400, []string{`"episode":2`, "not numbers in JSON"}},
		{"trailing data", "POST", base + "/episodes", js, step(okStep) + `{"episodes":[]}`, 400, []string{"unexpected data after the JSON value"}},
		{"byte order mark", "POST", base + "/episodes", js, "\ufeff" + step(okStep), 400, []string{"malformed JSON at byte offset 1"}},
		{"deeply nested", "POST", base + "/episodes", js, `{"episodes":` + nested + `}`, 400, []string{"exceeded max depth"}},
		{"empty body", "POST", base + "/episodes", js, ``, 400, []string{"the body is empty"}},
		{"whitespace body", "POST", base + "/episodes", js, " \n\t ", 400, []string{"the body is empty"}},
		{"empty NDJSON", "POST", base + "/episodes", nd, "\n\n", 400, []string{"at least one episode"}},

		// Types and numbers.
		{"reward as the string NaN", "POST", base + "/episodes", js, step(`{"state":"s","action":"truck","reward":"NaN"}`), 400, []string{`"episode":0`, `"step":0`, `"field":"reward"`, "expected a number, got a string"}},
		{"reward as the string Infinity", "POST", base + "/episodes", js, step(`{"state":"s","action":"truck","reward":"Infinity"}`), 400, []string{`"step":0`, `"field":"reward"`, "expected a number"}},
		{"reward 1e999", "POST", base + "/episodes", js, step(okStep + `,{"state":"s","action":"truck","reward":1e999}`), 400, []string{`"step":1`, `"field":"reward"`, "1e999 is out of range"}},
		{"reward -1e999", "POST", base + "/episodes", js, step(`{"state":"s","action":"truck","reward":-1e999}`), 400, []string{`"field":"reward"`, "out of range"}},
		{"reward too large to learn from", "POST", base + "/episodes", js, step(`{"state":"s","action":"truck","reward":1e300}`), 400, []string{`"field":"reward"`, "magnitude"}},
		{"probability 1e999", "POST", base + "/episodes", js, step(`{"state":"s","action":"truck","reward":1,"probability":1e999}`), 400, []string{`"field":"probability"`, "out of range"}},
		{"probability zero", "POST", base + "/episodes", js, step(`{"state":"s","action":"truck","reward":1,"probability":0}`), 400, []string{`"field":"probability"`, "must be in (0, 1]"}},
		{"probability above one", "POST", base + "/episodes", js, step(`{"state":"s","action":"truck","reward":1,"probability":1.5}`), 400, []string{`"field":"probability"`, "must be in (0, 1]"}},
		{"id as a huge number", "POST", base + "/episodes", js, `{"episodes":[{"id":123456789012345678901234567890,"steps":[` + okStep + `]}]}`, 400, []string{`"episode":0`, `"field":"id"`, "expected a string, got a number"}},
		{"steps as an object", "POST", base + "/episodes", js, `{"episodes":[{"id":"e1","steps":{"state":"s"}}]}`, 400, []string{`"field":"steps"`, "expected an array"}},
		{"episodes as a string", "POST", base + "/episodes", js, `{"episodes":"all of them"}`, 400, []string{`"field":"episodes"`, "expected an array"}},
		{"episodes null", "POST", base + "/episodes", js, `{"episodes":null}`, 400, []string{`"field":"episodes"`, "missing"}},

		// Structure and content.
		{"unknown top-level field", "POST", base + "/episodes", js, `{"episodes":[],"priority":"high"}`, 400, []string{"priority", "not a field"}},
		{"huge unknown field name", "POST", base + "/episodes", js, `{"episodes":[],"` + strings.Repeat("k", 100_000) + `":1}`, 400, []string{"kkkk...", "is not a field"}},
		{"unknown step field", "POST", base + "/episodes", js, step(`{"state":"s","action":"truck","rewrd":1}`), 400, []string{`"step":0`, "rewrd", "not a field"}},
		{"no episodes", "POST", base + "/episodes", js, `{"episodes":[]}`, 400, []string{"at least one episode"}},
		{"no steps", "POST", base + "/episodes", js, `{"episodes":[{"id":"e1","steps":[]}]}`, 400, []string{`"field":"steps"`, "at least one step"}},
		{"too many steps", "POST", base + "/episodes", js, step(manySteps), 400, []string{`"field":"steps"`, "10001 steps, more than the limit of 10000"}},
		{"duplicate ids in one batch", "POST", base + "/episodes", js, `{"episodes":[{"id":"twin","steps":[` + okStep + `]},{"id":"fresh","steps":[` + okStep + `]},{"id":"twin","steps":[` + okStep + `]}]}`, 400, []string{`"episode":2`, `"field":"id"`, "repeats the id of episode 0"}},
		{"unknown action", "POST", base + "/episodes", js, step(`{"state":"s","action":"bicycle","reward":1}`), 400, []string{`"field":"action"`, "not one of the policy"}},
		{"megabyte state", "POST", base + "/episodes", js, step(`{"state":"` + strings.Repeat("s", 1<<20) + `","action":"truck","reward":1}`), 400, []string{`"field":"state"`, "1048576 bytes, longer than the limit of 256"}},
		{"NUL in a state", "POST", base + "/episodes", js, step(`{"state":"rain\u0000north","action":"truck","reward":1}`), 400, []string{`"field":"state"`, "control characters"}},
		{"newline in an id", "POST", base + "/episodes", js, `{"episodes":[{"id":"a\nb","steps":[` + okStep + `]}]}`, 400, []string{`"field":"id"`, "control characters"}},
		{"invalid UTF-8 in a state", "POST", base + "/episodes", js, step(okStep + `,{"state":"caf` + "\xe9" + `","action":"truck","reward":1}`), 400, []string{`"episode":0`, `"step":1`, `"field":"state"`, "not valid UTF-8"}},
		{"invalid UTF-8 in an id", "POST", base + "/episodes", js, `{"episodes":[{"id":"` + "\xff\xfe" + `","steps":[` + okStep + `]}]}`, 400, []string{`"episode":0`, `"field":"id"`, "not valid UTF-8"}},
		{"invalid UTF-8 in NDJSON", "POST", base + "/episodes", nd, `{"id":"n1","steps":[` + okStep + `]}` + "\n" + `{"id":"n2","steps":[{"state":"` + "\xc3\x28" + `","action":"truck","reward":1}]}`, 400, []string{`"episode":1`, `"step":0`, `"field":"state"`, "not valid UTF-8"}},
		{"id too long", "POST", base + "/episodes", js, `{"episodes":[{"id":"` + strings.Repeat("i", 129) + `","steps":[` + okStep + `]}]}`, 400, []string{`"field":"id"`, "129 bytes, longer than the limit of 128"}},

		// Transport.
		{"wrong content type", "POST", base + "/episodes", "text/plain", step(okStep), 415, []string{"Content-Type must be application/json or application/x-ndjson"}},
		{"no content type", "POST", base + "/episodes", "", step(okStep), 415, []string{"Content-Type must be"}},
		{"form content type", "PUT", base, "application/x-www-form-urlencoded", "actions=a&actions=b", 415, []string{"Content-Type must be application/json"}},
		{"oversize body", "POST", base + "/episodes", js, oversize, 413, []string{"larger than the limit of 16777216 bytes"}},

		// Names in paths.
		{"traversal in a policy name", "GET", "/v1/policies/..%2F..%2Fetc%2Fpasswd", "", "", 400, []string{`"field":"policy"`, "policy names are"}},
		{"encoded slash in a policy name", "POST", "/v1/policies/parcel%2Frouting/episodes", js, step(okStep), 400, []string{`"field":"policy"`}},
		{"dot-dot policy", "PUT", "/v1/policies/..", js, `{"actions":["a","b"]}`, 400, []string{`"field":"policy"`}},
		{"policy name too long", "PUT", "/v1/policies/" + strings.Repeat("p", 65), js, `{"actions":["a","b"]}`, 400, []string{`"field":"policy"`, "1 to 64 characters"}},
		{"NUL in a state path", "GET", base + "/states/rain%00north", "", "", 400, []string{`"field":"state"`, "control characters"}},
		{"overlong state path", "GET", base + "/states/" + strings.Repeat("s", 300), "", "", 400, []string{`"field":"state"`, "longer than the limit of 256"}},

		// Policy settings.
		{"alpha as the string NaN", "PUT", base, js, `{"actions":["truck","drone"],"alpha":"NaN"}`, 400, []string{`"field":"alpha"`, "expected a number, got a string"}},
		{"alpha zero", "PUT", base, js, `{"actions":["truck","drone"],"alpha":0}`, 400, []string{`"field":"alpha"`, "greater than 0"}},
		{"gamma above one", "PUT", base, js, `{"actions":["truck","drone"],"gamma":1.5}`, 400, []string{`"field":"gamma"`, "at most 1"}},
		{"initial_q 1e999", "PUT", base, js, `{"actions":["truck","drone"],"initial_q":1e999}`, 400, []string{`"field":"initial_q"`, "out of range"}},
		{"initial_q too large", "PUT", base, js, `{"actions":["truck","drone"],"initial_q":-1e200}`, 400, []string{`"field":"initial_q"`, "at least -1e15"}},
		{"epsilon_min above epsilon", "PUT", base, js, `{"actions":["truck","drone"],"epsilon":0.1,"epsilon_min":0.3}`, 400, []string{`"field":"epsilon_min"`, "must not exceed epsilon"}},
		{"repeated action", "PUT", base, js, `{"actions":["truck","truck"]}`, 400, []string{`"field":"actions"`, "must not repeat"}},
		{"control character in an action", "PUT", base, js, `{"actions":["truck","dro\u0007ne"]}`, 400, []string{`"field":"actions[1]"`, "control characters"}},
		{"unknown setting", "PUT", base, js, `{"actions":["truck","drone"],"learning_rate":0.3}`, 400, []string{"learning_rate", "not a field"}},
		{"visit rule misspelt", "PUT", base, js, `{"actions":["truck","drone"],"visit":"sometimes"}`, 400, []string{`"field":"visit"`, "one of: first every"}},
		{"actions as an object", "PUT", base, js, `{"actions":{"truck":1}}`, 400, []string{`"field":"actions"`, "expected an array"}},

		// Choose.
		{"choose without a state", "POST", base + "/choose", js, `{"mode":"explore"}`, 400, []string{`"field":"state"`, "missing"}},
		{"choose in a strange mode", "POST", base + "/choose", js, `{"state":"s","mode":"EXPLORE"}`, 400, []string{`"field":"mode"`}},
		{"choose with an empty mask", "POST", base + "/choose", js, `{"state":"s","allowed":[]}`, 400, []string{`"field":"allowed"`}},
		{"choose with an unknown action", "POST", base + "/choose", js, `{"state":"s","allowed":["truck","hovercraft"]}`, 400, []string{`"field":"allowed[1]"`}},
		{"choose with a NUL state", "POST", base + "/choose", js, `{"state":"\u0000"}`, 400, []string{`"field":"state"`, "control characters"}},
		{"choose with invalid UTF-8", "POST", base + "/choose", js, `{"state":"` + "\xff" + `"}`, 400, []string{`"field":"state"`, "not valid UTF-8"}},
	}
	if len(cases) < 30 {
		t.Fatalf("only %d cases", len(cases))
	}
	counts := map[int]int{}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			r := s.withT(t).send(c.method, c.path, c.ctype, []byte(c.body), true)
			if r.Status != c.status {
				t.Fatalf("status %d, want %d: %.600s", r.Status, c.status, r.Body)
			}
			if len(r.Body) > 2048 {
				t.Errorf("the answer is %d bytes: refusals must not echo what they refuse", len(r.Body))
			}
			for _, w := range c.want {
				if !strings.Contains(string(r.Body), w) {
					t.Errorf("answer does not mention %q: %.600s", w, r.Body)
				}
			}
			if after := pgtest.Dump(t, db, tables...); after != before {
				t.Errorf("the database changed:\nbefore:\n%s\nafter:\n%s", before, after)
				before = after // report each change once
			}
			counts[r.Status]++
		})
	}
	t.Logf("%d hostile requests: %v", len(cases), fmt.Sprint(counts))
}

// Names that look like SQL, markup, paths or escapes are data: they are
// stored, learned and shown back exactly, and harm nothing.
func TestHostileNamesAreStoredAndShownAsSent(t *testing.T) {
	t.Parallel()
	db := pgtest.NewDatabase(t)
	s := startService(t, db)
	actions := []string{"a'); DROP TABLE policies; --", "<img src=x onerror=alert(1)>", `back\slash "quoted"`}
	states := []string{
		"'; DELETE FROM q_values; --", "<script>alert(1)</script>", "../../etc/passwd", "..%2F..%2Fetc",
		"50% off/now?x=1#top", "ünïcødé 🚚 ﷽", `{"json":"inside"}`, "$1 $2 ::text",
	}
	s.call("PUT", "/v1/policies/hostile-names", map[string]any{"actions": actions, "alpha": 1}, 201)
	var eps []episodeJSON
	for i, st := range states {
		eps = append(eps, episodeJSON{ID: st, Steps: []stepJSON{{State: st, Action: actions[i%len(actions)], Reward: float64(i + 1)}}})
	}
	s.call("POST", "/v1/policies/hostile-names/episodes", map[string]any{"episodes": eps}, 202)
	s.waitTrained("hostile-names", int64(len(eps)))
	for i, st := range states {
		var v struct {
			State        string `json:"state"`
			Known        bool   `json:"known"`
			GreedyAction string `json:"greedy_action"`
		}
		s.call("GET", "/v1/policies/hostile-names/states/"+url.PathEscape(st), nil, 200).decode(t, &v)
		if v.State != st || !v.Known || v.GreedyAction != actions[i%len(actions)] {
			t.Errorf("state %q reads back as %+v", st, v)
		}
	}
	var list struct {
		Policies []struct {
			Actions []string `json:"actions"`
			Pairs   int      `json:"pairs"`
		} `json:"policies"`
	}
	s.call("GET", "/v1/policies", nil, 200).decode(t, &list)
	if len(list.Policies) != 1 || !slices.Equal(list.Policies[0].Actions, actions) || list.Policies[0].Pairs != len(states) {
		t.Fatalf("policies read back as %+v", list.Policies)
	}
	// A repeat of the same ids is recognised as duplicates, byte for byte.
	var res struct{ Accepted, Duplicates int }
	s.call("POST", "/v1/policies/hostile-names/episodes", map[string]any{"episodes": eps}, 202).decode(t, &res)
	if res.Accepted != 0 || res.Duplicates != len(eps) {
		t.Fatalf("re-post: %+v", res)
	}
}
