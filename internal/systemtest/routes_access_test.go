package systemtest

import (
	"cmp"
	"encoding/json"
	"fmt"
	"net/http"
	"net/url"
	"regexp"
	"slices"
	"strings"
	"testing"

	"github.com/getkin/kin-openapi/openapi3"

	"github.com/qtally/qtally/api"
	"github.com/qtally/qtally/storage/pgtest"
)

// routeCase is how to make one documented operation succeed on policy
// alpha, for the access matrix below.
type routeCase struct {
	// params are the path's parameters besides {policy}, which is alpha.
	params map[string]string
	query  url.Values
	// body makes a fresh body (content type and bytes); nil for none.
	body func() (string, []byte)
	// want is the status of a request that may go through; for routes that
	// need no token, the status without one.
	want int
	// prepare runs before each request that may go through.
	prepare func()
	// header is sent with every request.
	header map[string]string
	// policy is the path's policy of the requests that may go through, when
	// not alpha (a deletion must not take alpha away from the other cases).
	policy string
}

func jsonBody(make func() any) func() (string, []byte) {
	return func() (string, []byte) { return "application/json", must(json.Marshal(make())) }
}

const policyNameRef = "#/components/schemas/PolicyName"

// policyFields lists the body fields of a schema that name a policy, as
// dotted paths.
func policyFields(t *testing.T, where string, sr *openapi3.SchemaRef, path string, depth int) []string {
	if sr == nil || depth > 8 {
		return nil
	}
	if sr.Ref == policyNameRef {
		return []string{path}
	}
	var out []string
	for name, prop := range sr.Value.Properties {
		field := strings.TrimPrefix(path+"."+name, ".")
		if ignored, _ := prop.Value.Extensions["x-ignored"].(bool); ignored {
			continue
		}
		if namesPolicy(name) && prop.Ref != policyNameRef {
			t.Errorf("%s: body field %s looks like a policy name but its schema is not %s", where, field, policyNameRef)
		}
		out = append(out, policyFields(t, where, prop, field, depth+1)...)
	}
	if sr.Value.Items != nil && len(policyFields(t, where, sr.Value.Items, path+"[]", depth+1)) > 0 {
		t.Fatalf("%s: a policy name inside an array (%s[]): teach this test to set it", where, path)
	}
	return out
}

// setField sets a dotted field of a JSON object body.
func setField(t *testing.T, body []byte, field, value string) []byte {
	var doc map[string]any
	if err := json.Unmarshal(body, &doc); err != nil {
		t.Fatalf("the body naming %s is not a JSON object: %v", field, err)
	}
	parts := strings.Split(field, ".")
	m := doc
	for _, p := range parts[:len(parts)-1] {
		next, ok := m[p].(map[string]any)
		if !ok {
			next = map[string]any{}
			m[p] = next
		}
		m = next
	}
	m[parts[len(parts)-1]] = value
	return must(json.Marshal(doc))
}

// namesPolicy is how a parameter or field naming a policy is called; the
// document must give each the PolicyName schema, which the checks below
// follow.
func namesPolicy(name string) bool { return name == "policy" || strings.HasSuffix(name, "_policy") }

var pathParamPattern = regexp.MustCompile(`\{(\w+)\}`)

// Every operation of the OpenAPI document, sent with no token, a token of
// each scope, and tokens limited to another policy, in the path and in
// every query parameter and body field that names a policy, answers as the
// document's x-scope says; and every admin API request is in the audit log.
// An operation added to the document without a case here fails the test.
func TestEveryRouteEnforcesAccess(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	noRedirects := *s.client
	noRedirects.CheckRedirect = func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }
	s.client = &noRedirects

	for _, p := range []string{"alpha", "beta"} {
		s.call("PUT", "/v1/policies/"+p, map[string]any{"actions": []string{"a", "b"}}, 201)
		s.post(p, withProbability(p+"-1", "s", "a", 1, 0.5), withProbability(p+"-2", "s", "b", 0, 0.5))
		s.waitTrained(p, 2)
	}
	s.call("POST", "/v1/policies/alpha/snapshots", map[string]any{"name": "keep"}, 201)
	for _, id := range []string{"kept-open", "ends-once"} {
		s.call("POST", "/v1/policies/alpha/choose", map[string]any{"state": "s", "episode": id, "step": 0}, 200)
	}
	var evaluation, replay struct {
		ID int64 `json:"id"`
	}
	s.call("POST", "/v1/policies/alpha/evaluations", map[string]any{"target": map[string]any{"table": "live"}}, 202).decode(t, &evaluation)
	s.call("POST", "/v1/policies/alpha/replays", map[string]any{"target": "alpha-first-replay"}, 202).decode(t, &replay)

	scopes := []string{"ingest", "choose", "admin"}
	unlimited, limitedToBeta, limitedToAlpha := map[string]string{}, map[string]string{}, map[string]string{}
	for _, sc := range scopes {
		unlimited[sc] = createToken(t, s.databaseURL, "--label", sc+" only", "--scope", sc)
		limitedToBeta[sc] = createToken(t, s.databaseURL, "--label", sc+" of beta", "--scope", sc, "--policy", "beta")
		limitedToAlpha[sc] = createToken(t, s.databaseURL, "--label", sc+" of alpha", "--scope", sc, "--policy", "alpha")
	}

	n := 0
	unique := func(prefix string) string { n++; return fmt.Sprintf("%s-%d", prefix, n) }
	cases := map[string]routeCase{
		"GET /livez":                {want: 200},
		"GET /readyz":               {want: 200},
		"GET /metrics":              {want: 200},
		"GET /sign-in":              {want: 200},
		"POST /sign-in":             {body: func() (string, []byte) { return "application/x-www-form-urlencoded", []byte("token=") }, want: 400},
		"POST /sign-out":            {body: func() (string, []byte) { return "application/x-www-form-urlencoded", nil }, want: 303},
		"GET /v1/openapi.json":      {want: 200},
		"GET /v1/policies":          {want: 200},
		"GET /v1/audit":             {want: 200},
		"GET /v1/policies/{policy}": {want: 200},
		"PUT /v1/policies/{policy}": {body: jsonBody(func() any { return map[string]any{"actions": []string{"a", "b"}} }), want: 200,
			header: map[string]string{"If-Match": "*"}},
		"PATCH /v1/policies/{policy}": {body: func() (string, []byte) { return "application/merge-patch+json", []byte(`{"epsilon":0.2}`) }, want: 200},
		"DELETE /v1/policies/{policy}": {policy: "doomed", want: 204,
			prepare: func() { s.call("PUT", "/v1/policies/doomed", map[string]any{"actions": []string{"a", "b"}}, 201) }},
		"GET /v1/policies/{policy}/settings-history": {want: 200},
		"DELETE /v1/policies/{policy}/episodes/{episode}": {params: map[string]string{"episode": "erased"}, want: 204,
			prepare: func() { s.post("alpha", withProbability("erased", "s", "a", 1, 0.5)) }},
		"POST /v1/policies/{policy}/episodes": {want: 202, body: jsonBody(func() any {
			return map[string]any{"episodes": []episodeJSON{oneStep(unique("ep"), "s", "a", 1)}}
		})},
		"POST /v1/policies/{policy}/choose":                 {body: jsonBody(func() any { return map[string]any{"state": "s"} }), want: 200},
		"GET /v1/policies/{policy}/states":                  {want: 200},
		"GET /v1/policies/{policy}/open-episodes/{episode}": {params: map[string]string{"episode": "kept-open"}, want: 200},
		"POST /v1/policies/{policy}/open-episodes/{episode}/rewards": {params: map[string]string{"episode": "kept-open"}, want: 200,
			body: jsonBody(func() any { return map[string]any{"reward": 1} })},
		// Ending an ended episode again answers 200 (already_ended).
		"POST /v1/policies/{policy}/open-episodes/{episode}/end": {params: map[string]string{"episode": "ends-once"}, want: 200,
			body: jsonBody(func() any { return map[string]any{"reward": 1} })},
		"GET /v1/policies/{policy}/states/{state}": {params: map[string]string{"state": "s"}, want: 200},
		"GET /":                           {want: 200},
		"GET /policies/{policy}":          {want: 200},
		"GET /policies/{policy}/states":   {want: 200},
		"GET /v1/policies/{policy}/table": {want: 200},
		"PUT /v1/policies/{policy}/table": {want: 200, body: func() (string, []byte) {
			return "text/csv", []byte("state,action,q,visits\ns,a,1,1\n")
		}},
		"GET /v1/policies/{policy}/diff":                 {query: url.Values{"from": {"keep"}}, want: 200},
		"GET /v1/policies/{policy}/snapshots":            {want: 200},
		"POST /v1/policies/{policy}/snapshots":           {body: jsonBody(func() any { return map[string]any{"name": unique("snap")} }), want: 201},
		"GET /v1/policies/{policy}/snapshots/{snapshot}": {params: map[string]string{"snapshot": "keep"}, want: 200},
		"DELETE /v1/policies/{policy}/snapshots/{snapshot}": {params: map[string]string{"snapshot": "doomed"}, want: 204,
			prepare: func() { s.call("POST", "/v1/policies/alpha/snapshots", map[string]any{"name": "doomed"}, 201) }},
		"GET /v1/policies/{policy}/snapshots/{snapshot}/table":    {params: map[string]string{"snapshot": "keep"}, want: 200},
		"POST /v1/policies/{policy}/snapshots/{snapshot}/restore": {params: map[string]string{"snapshot": "keep"}, want: 200},
		"POST /v1/policies/{policy}/evaluations":                  {body: jsonBody(func() any { return map[string]any{"target": map[string]any{"table": "live"}} }), want: 202},
		"GET /v1/policies/{policy}/evaluations/{id}":              {params: map[string]string{"id": fmt.Sprint(evaluation.ID)}, want: 200},
		"GET /v1/policies/{policy}/evaluations":                   {want: 200},
		"GET /v1/policies/{policy}/replays":                       {want: 200},
		"POST /v1/policies/{policy}/replays":                      {body: jsonBody(func() any { return map[string]any{"target": unique("alpha-replay")} }), want: 202},
		"GET /v1/policies/{policy}/replays/{id}":                  {params: map[string]string{"id": fmt.Sprint(replay.ID)}, want: 200},
	}

	doc := must(openapi3.NewLoader().LoadFromData(api.OpenAPIDocument))
	covered := map[string]bool{}
	for _, path := range doc.Paths.InMatchingOrder() {
		item := doc.Paths.Value(path)
		for method, op := range item.Operations() {
			key := method + " " + path
			c, ok := cases[key]
			if !ok {
				t.Errorf("%s is in the OpenAPI document but this test has no case for it", key)
				continue
			}
			covered[key] = true
			t.Run(key, func(t *testing.T) {
				sub := s.withT(t)
				checkRouteAccess(t, sub, method, path, op, item, c, unlimited, limitedToBeta, limitedToAlpha)
			})
		}
	}
	for key := range cases {
		if !covered[key] {
			t.Errorf("case %s is not in the OpenAPI document", key)
		}
	}
}

func checkRouteAccess(t *testing.T, s *service, method, path string, op *openapi3.Operation, item *openapi3.PathItem, c routeCase,
	unlimited, limitedToBeta, limitedToAlpha map[string]string) {
	concrete := func(policy string, query url.Values) string {
		p := pathParamPattern.ReplaceAllStringFunc(path, func(m string) string {
			name := m[1 : len(m)-1]
			if name == "policy" {
				return policy
			}
			return url.PathEscape(c.params[name])
		})
		if len(query) > 0 {
			p += "?" + query.Encode()
		}
		return p
	}
	body := func() (string, []byte) {
		if c.body == nil {
			return "", nil
		}
		return c.body()
	}
	send := func(secret, policy string, query url.Values, ctype string, data []byte) reply {
		as := s.as(secret)
		for k, v := range c.header {
			as = as.withHeader(k, v)
		}
		return as.send(method, concrete(policy, query), ctype, data, true)
	}
	target := cmp.Or(c.policy, "alpha")
	page := method == "GET" && !strings.HasPrefix(path, "/v1/")

	// No token.
	secured := op.Security == nil || len(*op.Security) > 0
	ctype, data := body()
	r := send("", target, c.query, ctype, data)
	switch {
	case !secured:
		if r.Status != c.want {
			t.Fatalf("without a token: %d %s, want %d", r.Status, r.Body, c.want)
		}
		return
	case page:
		if r.Status != http.StatusSeeOther || r.Header.Get("Location") != "/sign-in" {
			t.Fatalf("page without a token: %d to %q, want 303 to /sign-in", r.Status, r.Header.Get("Location"))
		}
	case r.Status != 401:
		t.Fatalf("without a token: %d %s, want 401", r.Status, r.Body)
	}

	// x-scope is "any", or the scopes that may use the route, separated by
	// spaces; a token with none of them is told it lacks the first.
	scope, _ := op.Extensions["x-scope"].(string)
	scopes := strings.Fields(scope)
	for _, sc := range scopes {
		if scope != "any" && !slices.Contains([]string{"ingest", "choose", "admin"}, sc) {
			t.Fatalf("x-scope is %q; the document must say which scope each secured operation needs", scope)
		}
	}
	if len(scopes) == 0 {
		t.Fatalf("x-scope is empty; the document must say which scope each secured operation needs")
	}
	// A token of each scope, for every policy.
	for _, sc := range []string{"ingest", "choose", "admin"} {
		allowed := scope == "any" || slices.Contains(scopes, sc)
		if allowed && c.prepare != nil {
			c.prepare()
		}
		ctype, data := body()
		r := send(unlimited[sc], target, c.query, ctype, data)
		if allowed {
			if r.Status != c.want {
				t.Fatalf("%s token: %d %s, want %d", sc, r.Status, r.Body, c.want)
			}
			if scope == "admin" && !page {
				checkAudited(t, s, method, path, sc+" only", c.want)
			}
		} else if r.Status != 403 || !strings.Contains(string(r.Body), "lacks the "+scopes[0]+" scope") {
			t.Fatalf("%s token: %d %s, want 403 for lacking the %s scope", sc, r.Status, r.Body, scopes[0])
		}
	}

	own := scopes[0]
	if own == "any" {
		own = "admin"
	}
	// A token limited to another policy: refused for a path policy that
	// exists and one that does not, alike.
	if strings.Contains(path, "{policy}") {
		var first reply
		for i, policy := range []string{"alpha", "ghost"} {
			ctype, data := body()
			r := send(limitedToBeta[own], policy, c.query, ctype, data)
			if r.Status != 403 || !strings.Contains(string(r.Body), "limited to other policies") {
				t.Fatalf("token limited to beta, path policy %s: %d %s, want 403", policy, r.Status, r.Body)
			}
			if i == 0 {
				first = r
			} else if problemWithout(r, policy) != problemWithout(first, "alpha") {
				t.Fatalf("the answers for an existing and a missing policy differ:\n%s\n%s", first.Body, r.Body)
			}
		}
	} else {
		if c.prepare != nil {
			c.prepare()
		}
		ctype, data := body()
		if r := send(limitedToBeta[own], "", c.query, ctype, data); r.Status != c.want {
			t.Fatalf("token limited to beta: %d %s, want %d", r.Status, r.Body, c.want)
		}
	}

	// Every query parameter and body field naming a policy, set to another
	// policy, existing or not, by a token limited to the path's policy.
	type namer struct {
		where string
		set   func(value string) (url.Values, string, []byte)
	}
	var namers []namer
	for _, p := range append(item.Parameters, op.Parameters...) {
		isName := p.Value.Schema != nil && p.Value.Schema.Ref == policyNameRef
		if namesPolicy(p.Value.Name) && !isName {
			t.Errorf("%s parameter %s looks like a policy name but its schema is not %s", p.Value.In, p.Value.Name, policyNameRef)
		}
		if p.Value.In == "query" && isName {
			name := p.Value.Name
			namers = append(namers, namer{"query " + name, func(v string) (url.Values, string, []byte) {
				q := url.Values{}
				for k, vs := range c.query {
					q[k] = vs
				}
				q.Set(name, v)
				ctype, data := body()
				return q, ctype, data
			}})
		}
	}
	if op.RequestBody != nil {
		if mt := op.RequestBody.Value.Content.Get("application/json"); mt != nil {
			for _, f := range policyFields(t, method+" "+path, mt.Schema, "", 0) {
				namers = append(namers, namer{"body " + f, func(v string) (url.Values, string, []byte) {
					ctype, data := body()
					return c.query, ctype, setField(t, data, f, v)
				}})
			}
		}
	}
	for _, nm := range namers {
		var first reply
		for i, other := range []string{"beta", "ghost"} {
			q, ctype, data := nm.set(other)
			r := send(limitedToAlpha[own], "alpha", q, ctype, data)
			if r.Status != 403 || !strings.Contains(string(r.Body), "limited to other policies") {
				t.Fatalf("%s = %s with a token limited to alpha: %d %s, want 403", nm.where, other, r.Status, r.Body)
			}
			if i == 0 {
				first = r
			} else if problemWithout(r, other) != problemWithout(first, "beta") {
				t.Fatalf("%s: the answers for an existing and a missing policy differ:\n%s\n%s", nm.where, first.Body, r.Body)
			}
		}
		t.Logf("%s names a policy: refused alike for beta and ghost", nm.where)
	}
}

type auditEntry struct {
	ID            int64    `json:"id"`
	Via           string   `json:"via"`
	TokenID       *int64   `json:"token_id"`
	TokenLabel    string   `json:"token_label"`
	Method        string   `json:"method"`
	Route         string   `json:"route"`
	Path          string   `json:"path"`
	Policy        string   `json:"policy"`
	PoliciesNamed []string `json:"policies_named"`
	Object        string   `json:"object"`
	Status        int      `json:"status"`
}

type auditPage struct {
	Entries    []auditEntry `json:"entries"`
	NextBefore *int64       `json:"next_before"`
}

// checkAudited asserts that the newest entry of the audit log is the
// request just made.
func checkAudited(t *testing.T, s *service, method, path, label string, status int) {
	t.Helper()
	var page auditPage
	s.call("GET", "/v1/audit?limit=1", nil, 200).decode(t, &page)
	route := pathParamPattern.ReplaceAllString(path, ":$1")
	if len(page.Entries) != 1 {
		t.Fatalf("the audit log is empty after %s %s", method, path)
	}
	e := page.Entries[0]
	if e.Method != method || e.Route != route || e.TokenLabel != label || e.Status != status || e.Via != "api" || e.TokenID == nil {
		t.Fatalf("newest audit entry %+v, want %s %s by %q answered %d", e, method, route, label, status)
	}
}
