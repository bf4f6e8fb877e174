package systemtest

import (
	"fmt"
	"slices"
	"strings"
	"testing"

	"github.com/qtally/qtally/storage/pgtest"
)

type jobPage struct {
	Jobs []struct {
		ID     int64  `json:"id"`
		Kind   string `json:"kind"`
		Policy string `json:"policy"`
	} `json:"jobs"`
	NextCursor string `json:"next_cursor"`
}

// A policy lists its own evaluations and replays, newest first, a page at
// a time; an id that is not one of the policy's jobs of that kind answers
// 404 saying where to look, without naming another policy.
func TestPoliciesListTheirJobs(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	half := 0.5
	for _, p := range []string{"nudges", "offers"} {
		s.call("PUT", "/v1/policies/"+p, map[string]any{"actions": []string{"remind", "skip"}}, 201)
		s.post(p, episodeJSON{ID: p + "-1", Steps: []stepJSON{{State: "cart", Action: "remind", Reward: 1, Probability: &half}}})
	}
	start := func(path string, body any) int64 {
		var job jobView[evaluationResult]
		s.call("POST", path, body, 202).decode(t, &job)
		return job.ID
	}
	// Ids interleave across policies and kinds.
	var nudgeEvaluations []int64
	nudgeEvaluations = append(nudgeEvaluations, start("/v1/policies/nudges/evaluations", map[string]any{"resamples": 100}))
	offerEvaluation := start("/v1/policies/offers/evaluations", map[string]any{"resamples": 100})
	nudgeEvaluations = append(nudgeEvaluations, start("/v1/policies/nudges/evaluations", map[string]any{"resamples": 100}))
	replay := start("/v1/policies/nudges/replays", map[string]any{"target": "nudges-slower", "alpha": 0.01})
	nudgeEvaluations = append(nudgeEvaluations, start("/v1/policies/nudges/evaluations", map[string]any{"resamples": 100}))
	slices.Reverse(nudgeEvaluations) // newest first

	list := func(path string) jobPage {
		var page jobPage
		s.call("GET", path, nil, 200).decode(t, &page)
		return page
	}
	ids := func(page jobPage, kind, policy string) []int64 {
		var out []int64
		for _, j := range page.Jobs {
			if j.Kind != kind || j.Policy != policy {
				t.Fatalf("a %s listing of %s holds %+v", kind, policy, j)
			}
			out = append(out, j.ID)
		}
		return out
	}
	first := list("/v1/policies/nudges/evaluations?limit=2")
	if got := ids(first, "evaluation", "nudges"); !slices.Equal(got, nudgeEvaluations[:2]) || first.NextCursor == "" {
		t.Fatalf("first page: %v cursor %q, want %v and a cursor", got, first.NextCursor, nudgeEvaluations[:2])
	}
	second := list("/v1/policies/nudges/evaluations?limit=2&cursor=" + first.NextCursor)
	if got := ids(second, "evaluation", "nudges"); !slices.Equal(got, nudgeEvaluations[2:]) || second.NextCursor != "" {
		t.Fatalf("second page: %v cursor %q, want %v and no cursor", got, second.NextCursor, nudgeEvaluations[2:])
	}
	if got := ids(list("/v1/policies/nudges/evaluations"), "evaluation", "nudges"); !slices.Equal(got, nudgeEvaluations) {
		t.Fatalf("one page of all: %v, want %v", got, nudgeEvaluations)
	}
	if got := ids(list("/v1/policies/nudges/replays"), "replay", "nudges"); !slices.Equal(got, []int64{replay}) {
		t.Fatalf("replays: %v, want [%d]", got, replay)
	}
	if got := ids(list("/v1/policies/offers/evaluations"), "evaluation", "offers"); !slices.Equal(got, []int64{offerEvaluation}) {
		t.Fatalf("offers' evaluations: %v, want [%d]", got, offerEvaluation)
	}
	if page := list("/v1/policies/offers/replays"); len(page.Jobs) != 0 || page.NextCursor != "" {
		t.Fatalf("offers has no replays, listed %+v", page)
	}

	// Another policy's job: 404 pointing at this policy's listing, naming
	// no other policy (a token may be limited to this one).
	r := s.call("GET", fmt.Sprintf("/v1/policies/offers/evaluations/%d", nudgeEvaluations[0]), nil, 404)
	if body := string(r.Body); !strings.Contains(body, "GET /v1/policies/offers/evaluations lists") || strings.Contains(body, "nudges") {
		t.Fatalf("another policy's evaluation: %s", body)
	}
	r = s.call("GET", fmt.Sprintf("/v1/policies/offers/replays/%d", replay), nil, 404)
	if body := string(r.Body); !strings.Contains(body, "GET /v1/policies/offers/replays lists") || strings.Contains(body, "nudges") {
		t.Fatalf("another policy's replay: %s", body)
	}
	// This policy's job of the other kind: 404 with its path.
	r = s.call("GET", fmt.Sprintf("/v1/policies/nudges/evaluations/%d", replay), nil, 404)
	if want := fmt.Sprintf("is its replay; read it at GET /v1/policies/nudges/replays/%d", replay); !strings.Contains(string(r.Body), want) {
		t.Fatalf("a replay read as an evaluation: %s, want it to say %q", r.Body, want)
	}
	r = s.call("GET", fmt.Sprintf("/v1/policies/nudges/replays/%d", nudgeEvaluations[0]), nil, 404)
	if want := fmt.Sprintf("is its evaluation; read it at GET /v1/policies/nudges/evaluations/%d", nudgeEvaluations[0]); !strings.Contains(string(r.Body), want) {
		t.Fatalf("an evaluation read as a replay: %s, want it to say %q", r.Body, want)
	}
	s.call("GET", "/v1/policies/nudges/evaluations/999999", nil, 404)

	for _, bad := range []struct{ query, field string }{
		{"limit=0", "limit"}, {"limit=501", "limit"}, {"limit=two", "limit"},
		{"cursor=not-one", "cursor"}, {"cursor=" + strings.Repeat("A", 8), "cursor"},
	} {
		// raw: the document itself rules these out.
		r := s.send("GET", "/v1/policies/nudges/evaluations?"+bad.query, "", nil, true)
		if r.Status != 400 || !strings.Contains(string(r.Body), `"field":"`+bad.field+`"`) {
			t.Fatalf("?%s: %d %s, want 400 with field %s", bad.query, r.Status, r.Body, bad.field)
		}
	}
	s.call("GET", "/v1/policies/nowhere/evaluations", nil, 404)
	feeder := createToken(t, s.databaseURL, "--label", "feeder", "--scope", "ingest,choose")
	s.as(feeder).call("GET", "/v1/policies/nudges/evaluations", nil, 403)
}
