package systemtest

import (
	"io"
	"net/http"
	"net/http/cookiejar"
	"net/url"
	"strings"
	"testing"

	"github.com/qtally/qtally/storage/pgtest"
)

// A browser cannot send a bearer header, so the status pages take an admin
// token from a cookie set by signing in; the API never accepts the cookie.
func TestStatusPagesSignIn(t *testing.T) {
	t.Parallel()
	db := pgtest.NewDatabase(t)
	s := startService(t, db)
	s.call("PUT", "/v1/policies/renewals", map[string]any{"actions": []string{"retry", "wait"}}, 201)
	admin := createToken(t, db, "--label", "operator", "--scope", "admin")
	chooser := createToken(t, db, "--label", "app", "--scope", "choose")

	jar, err := cookiejar.New(nil)
	if err != nil {
		t.Fatal(err)
	}
	browser := &http.Client{Jar: jar, CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
	get := func(path string) (int, string, string) {
		t.Helper()
		resp, err := browser.Get(s.URL + path)
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		body, _ := io.ReadAll(resp.Body)
		return resp.StatusCode, resp.Header.Get("Location"), string(body)
	}
	signIn := func(token string) (int, string) {
		t.Helper()
		resp, err := browser.PostForm(s.URL+"/sign-in", url.Values{"token": {token}})
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		return resp.StatusCode, resp.Header.Get("Location")
	}

	if code, loc, _ := get("/"); code != http.StatusSeeOther || loc != "/sign-in" {
		t.Fatalf("unsigned overview: %d to %q, want 303 to /sign-in", code, loc)
	}
	if code, _, body := get("/sign-in"); code != 200 || !strings.Contains(body, `name="token"`) {
		t.Fatalf("sign-in page: %d %s", code, body)
	}
	if code, _ := signIn("qtk_1_not-a-real-secret"); code != http.StatusUnauthorized {
		t.Fatalf("bad token signed in: %d", code)
	}
	if code, _ := signIn(chooser); code != http.StatusForbidden {
		t.Fatalf("token without admin scope signed in: %d", code)
	}
	if code, loc := signIn(admin); code != http.StatusSeeOther || loc != "/" {
		t.Fatalf("admin sign-in: %d to %q", code, loc)
	}
	if code, _, body := get("/"); code != 200 || !strings.Contains(body, "renewals") {
		t.Fatalf("signed-in overview: %d", code)
	}
	if code, _, _ := get("/policies/renewals"); code != 200 {
		t.Fatalf("signed-in policy page: %d", code)
	}
	// The cookie is for pages only: the API still wants a bearer token.
	if code, _, _ := get("/v1/policies"); code != http.StatusUnauthorized {
		t.Fatalf("API answered %d to a cookie", code)
	}
}
