package systemtest

import (
	"encoding/json"
	"net/url"
	"regexp"
	"strings"
	"testing"

	"github.com/qtally/qtally/storage/pgtest"
)

// withProbability is a one-step episode that says with what probability
// its action was chosen, so that evaluations can use it.
func withProbability(id, state, action string, reward, probability float64) episodeJSON {
	return episodeJSON{ID: id, Steps: []stepJSON{{State: state, Action: action, Reward: reward, Probability: &probability}}}
}

// problemWithout is a problem answer with every occurrence of name
// replaced, so that answers about two different names can be compared.
func problemWithout(r reply, name string) string {
	body := requestIDMember.ReplaceAllString(string(r.Body), "")
	return r.Header.Get("Content-Type") + " " + strings.ReplaceAll(body, name, "NAME")
}

// requestIDMember is a problem's request_id, which names the request and
// differs between any two.
var requestIDMember = regexp.MustCompile(`,"request_id":"[^"]*"`)

// A token limited to some policies cannot reach another policy through a
// name in the query or the body either, and cannot tell from the answer
// whether that other policy exists.
func TestLimitedTokenCannotNameOtherPolicies(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	for _, p := range []string{"alpha", "beta"} {
		s.call("PUT", "/v1/policies/"+p, map[string]any{"actions": []string{"a", "b"}}, 201)
		s.post(p, withProbability(p+"-1", "s", "a", 1, 0.5), withProbability(p+"-2", "s", "b", 0, 0.5))
		s.waitTrained(p, 2)
	}
	s.call("PUT", "/v1/policies/wide", map[string]any{"actions": []string{"x", "y", "z"}}, 201)
	alphaOnly := s.as(createToken(t, s.databaseURL, "--label", "alpha owner", "--scope", "admin", "--policy", "alpha"))

	type attempt struct {
		name   string
		method string
		path   func(other string) string
		body   func(other string) any
	}
	attempts := []attempt{
		{"diff to_policy", "GET",
			func(o string) string { return "/v1/policies/alpha/diff?to_policy=" + url.QueryEscape(o) }, nil},
		{"evaluation target.policy", "POST",
			func(string) string { return "/v1/policies/alpha/evaluations" },
			func(o string) any { return map[string]any{"target": map[string]any{"policy": o, "table": "live"}} }},
		{"replay target", "POST",
			func(string) string { return "/v1/policies/alpha/replays" },
			func(o string) any { return map[string]any{"target": o} }},
	}
	// "beta" exists with the same actions, "wide" exists with other
	// actions, "alpha-copy" and "ghost" do not exist: each answer must be
	// the same 403.
	for _, a := range attempts {
		t.Run(a.name, func(t *testing.T) {
			var first reply
			for i, other := range []string{"beta", "wide", "alpha-copy", "ghost"} {
				var data []byte
				ctype := ""
				if a.body != nil {
					data, ctype = must(json.Marshal(a.body(other))), "application/json"
				}
				r := alphaOnly.send(a.method, a.path(other), ctype, data, false)
				if r.Status != 403 || !strings.Contains(string(r.Body), "limited to other policies") {
					t.Fatalf("naming %q: %d %s, want 403", other, r.Status, r.Body)
				}
				if i == 0 {
					first = r
				} else if problemWithout(r, other) != problemWithout(first, "beta") {
					t.Fatalf("the answer for %q differs from the one for an existing policy:\n%s\n%s", other, r.Body, first.Body)
				}
			}
		})
	}
	// Nothing was created on the way.
	var list struct {
		Policies []struct {
			Name string `json:"name"`
		} `json:"policies"`
	}
	s.call("GET", "/v1/policies", nil, 200).decode(t, &list)
	if len(list.Policies) != 3 {
		t.Fatalf("policies after the attempts: %+v, want alpha, beta and wide only", list.Policies)
	}

	// Names the token does cover still work: its own policy in the query,
	// and a replay into a name it was given.
	alphaOnly.call("GET", "/v1/policies/alpha/diff?to_policy=alpha&to=live&from=live&limit=5", nil, 400)
	withCopy := s.as(createToken(t, s.databaseURL, "--label", "alpha and its copy", "--scope", "admin", "--policy", "alpha,alpha-copy"))
	withCopy.call("POST", "/v1/policies/alpha/replays", map[string]any{"target": "alpha-copy"}, 202)
	withCopy.call("POST", "/v1/policies/alpha/evaluations", map[string]any{"target": map[string]any{"policy": "alpha", "table": "live"}}, 202)
}

// The overview page shows a limited token only its own policies.
func TestOverviewShowsOnlyTheTokensPolicies(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	for _, p := range []string{"alpha", "beta"} {
		s.call("PUT", "/v1/policies/"+p, map[string]any{"actions": []string{"a", "b"}}, 201)
	}
	alphaOnly := s.as(createToken(t, s.databaseURL, "--label", "alpha owner", "--scope", "admin", "--policy", "alpha"))
	page := string(alphaOnly.call("GET", "/", nil, 200).Body)
	if !strings.Contains(page, `data-policy="alpha"`) || strings.Contains(page, "beta") {
		t.Fatalf("the overview for a token limited to alpha:\n%s", page)
	}
	if page := string(s.call("GET", "/", nil, 200).Body); !strings.Contains(page, `data-policy="beta"`) {
		t.Fatalf("the overview for an unlimited token lacks beta:\n%s", page)
	}
}
