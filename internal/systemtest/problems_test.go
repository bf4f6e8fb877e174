package systemtest

import (
	"bytes"
	"context"
	"io"
	"strings"
	"testing"
	"time"

	"github.com/getkin/kin-openapi/openapi3"
	"github.com/getkin/kin-openapi/routers/gorillamux"

	"github.com/qtally/qtally/storage/pgtest"
)

// The problem type clients match on by default: a section of
// docs/problems.md in the project's repository. It is a published
// contract, so it is spelled out here rather than taken from the code.
const defaultProblemDocs = "https://github.com/qtally/qtally/blob/main/docs/problems.md"

// provokeProblems makes the service answer each of its own problem types
// that a request can cause and returns the type of each answer by the name
// it should have.
func provokeProblems(t *testing.T, s *service) map[string]string {
	t.Helper()
	typeOf := func(r reply) string {
		var p struct {
			Type string `json:"type"`
		}
		r.decode(t, &p)
		return p.Type
	}
	s.call("PUT", "/v1/policies/pay", map[string]any{"actions": []string{"retry", "wait"}}, 201)
	s.call("POST", "/v1/policies/pay/snapshots", map[string]any{"name": "first"}, 201)
	chooseOnly := createToken(t, s.databaseURL, "--label", "choose only", "--scope", "choose")
	anonymous := s.as("").send("GET", "/v1/policies/pay", "", nil, true)
	if anonymous.Status != 401 {
		t.Fatalf("a request without a token: status %d, want 401", anonymous.Status)
	}
	return map[string]string{
		"not-found":       typeOf(s.call("GET", "/v1/policies/nobody", nil, 404)),
		"invalid-input":   typeOf(s.call("POST", "/v1/policies/pay/episodes", map[string]any{"episodes": []episodeJSON{{ID: "e1", Steps: []stepJSON{{State: "s", Action: "fly", Reward: 1}}}}}, 400)),
		"conflict":        typeOf(s.call("POST", "/v1/policies/pay/snapshots", map[string]any{"name": "first"}, 409)),
		"unauthenticated": typeOf(anonymous),
		"forbidden":       typeOf(s.as(chooseOnly).call("GET", "/v1/policies/pay/snapshots", nil, 403)),
	}
}

func TestProblemTypesAreAddressesOfTheirDocumentation(t *testing.T) {
	t.Parallel()
	databaseURL := pgtest.NewDatabase(t)
	s := startService(t, databaseURL)
	for name, got := range provokeProblems(t, s) {
		if want := defaultProblemDocs + "#" + name; got != want {
			t.Errorf("%s: type %q, want %q", name, got, want)
		}
	}
}

// With --problem-docs the types move to that address, and so does the
// OpenAPI document the service serves: every answer of that service is
// checked against the document it serves.
func TestProblemDocsAddressIsConfigurable(t *testing.T) {
	t.Parallel()
	const docs = "https://docs.example.com/qtally/problems.html"
	s := startService(t, pgtest.NewDatabase(t), "serve", "--problem-docs", docs)
	served := s.call("GET", "/v1/openapi.json", nil, 200).Body
	if bytes.Contains(served, []byte(defaultProblemDocs)) {
		t.Errorf("the served OpenAPI document still names %s", defaultProblemDocs)
	}
	loader := openapi3.NewLoader()
	doc, err := loader.LoadFromData(served)
	if err != nil {
		t.Fatalf("load the served OpenAPI document: %v", err)
	}
	if err = doc.Validate(loader.Context); err != nil {
		t.Fatalf("the served OpenAPI document is invalid: %v", err)
	}
	if s.router, err = gorillamux.NewRouter(doc); err != nil {
		t.Fatal(err)
	}
	for name, got := range provokeProblems(t, s) {
		if want := docs + "#" + name; got != want {
			t.Errorf("%s: type %q, want %q", name, got, want)
		}
	}

	// An address that cannot take the names as fragments is refused at start.
	ctx, cancel := context.WithTimeout(t.Context(), time.Minute) // catches a hang only
	defer cancel()
	env := map[string]string{"DATABASE_URL": s.databaseURL, "QTALLY_LISTEN": "127.0.0.1:0"}
	for _, bad := range []string{"urn:example:problems", "https://docs.example.com/problems#top", "/docs/problems"} {
		err := run(ctx, []string{"qtally", "serve", "--problem-docs", bad}, func(k string) string { return env[k] }, io.Discard, io.Discard)
		if err == nil || !strings.Contains(err.Error(), "--problem-docs") {
			t.Errorf("serve --problem-docs %s: %v, want a refusal naming the flag", bad, err)
		}
	}
}
