package api

import (
	"net/http"
	"net/http/httptest"
	"slices"
	"testing"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/internal/access"
)

// A pooled context forgets its request on release: the next request that
// takes it starts with no token, no session and no names, and the names
// handed out for the audit log stay as they were.
func TestRequestContextForgetsItsRequest(t *testing.T) {
	e := echo.New()
	rc := wrapRequest(e.NewContext(httptest.NewRequest(http.MethodGet, "/", nil), httptest.NewRecorder()))
	rc.token, rc.session = &access.Token{ID: 7, Label: "app"}, true
	for _, name := range []string{"alpha", "beta", "alpha"} {
		if err := namePolicy(rc, "", name); err != nil {
			t.Fatal(err)
		}
	}
	names := namedPolicies(rc)
	if want := []string{"alpha", "beta"}; !slices.Equal(names, want) {
		t.Fatalf("named policies %q, want %q", names, want)
	}
	if requestToken(rc).ID != 7 || !inSession(rc) {
		t.Fatal("the token or the session was not kept on the request")
	}
	rc.release()
	if rc.Context != nil || rc.token != nil || rc.session || len(rc.policies) != 0 {
		t.Errorf("released context still holds its request: %+v", *rc)
	}
	if !slices.Equal(names, []string{"alpha", "beta"}) {
		t.Errorf("the names handed out changed on release: %q", names)
	}
	// A context observe did not wrap carries nothing.
	plain := e.NewContext(httptest.NewRequest(http.MethodGet, "/", nil), httptest.NewRecorder())
	if requestToken(plain) != nil || inSession(plain) || namedPolicies(plain) != nil {
		t.Error("an unwrapped context carries request state")
	}
}
