package systemtest

import (
	"encoding/json"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/storage/pgtest"
)

var oneStepBody = func(id string) map[string]any {
	return map[string]any{"episodes": []episodeJSON{{ID: id, Steps: []stepJSON{{State: "s", Action: "a", Reward: 1}}}}}
}

// Each scope opens its routes and no others (a policy's status is open to
// every scope, since applications need its backlog and revision); a token
// limited to policies opens only those; missing and bad tokens get 401 with a challenge.
func TestTokensScopesAndPolicies(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	for _, p := range []string{"alpha", "beta"} {
		s.call("PUT", "/v1/policies/"+p, map[string]any{"actions": []string{"a", "b"}}, 201)
	}
	ingestAlpha := createToken(t, s.databaseURL, "--label", "alpha feeder", "--scope", "ingest", "--policy", "alpha")
	chooser := createToken(t, s.databaseURL, "--label", "front end", "--scope", "choose")
	adminAlpha := createToken(t, s.databaseURL, "--label", "alpha owner", "--scope", "admin", "--policy", "alpha")
	// Right id, wrong random part.
	forged := ingestAlpha[:len(ingestAlpha)-4] + "AAAA"
	if forged == ingestAlpha {
		forged = ingestAlpha[:len(ingestAlpha)-4] + "BBBB"
	}

	episodes := func(p, id string) (string, string, any) {
		return "POST", "/v1/policies/" + p + "/episodes", oneStepBody(id)
	}
	choose := func(p string) (string, string, any) {
		return "POST", "/v1/policies/" + p + "/choose", map[string]any{"state": "s", "mode": "explore"}
	}
	state := func(p string) (string, string, any) { return "GET", "/v1/policies/" + p + "/states/s", nil }
	getPolicy := func(p string) (string, string, any) { return "GET", "/v1/policies/" + p, nil }
	putPolicy := func(p string) (string, string, any) {
		return "PUT", "/v1/policies/" + p, map[string]any{"actions": []string{"a", "b"}, "epsilon": 0.2}
	}
	type request = func() (string, string, any)
	cases := []struct {
		name   string
		secret string
		req    request
		want   int
		detail string
	}{
		{"ingest token posts to its policy", ingestAlpha, func() (string, string, any) { return episodes("alpha", "e1") }, 202, ""},
		{"ingest token, other policy", ingestAlpha, func() (string, string, any) { return episodes("beta", "e2") }, 403, "limited to other policies"},
		{"ingest token cannot choose", ingestAlpha, func() (string, string, any) { return choose("alpha") }, 403, "lacks the choose scope"},
		{"ingest token reads its policy's status", ingestAlpha, func() (string, string, any) { return getPolicy("alpha") }, 200, `"backlog"`},
		{"ingest token, other policy's status", ingestAlpha, func() (string, string, any) { return getPolicy("beta") }, 403, "limited to other policies"},
		{"ingest token cannot list policies", ingestAlpha, func() (string, string, any) { return "GET", "/v1/policies", nil }, 403, "lacks the admin scope"},
		{"ingest token cannot change its policy", ingestAlpha, func() (string, string, any) { return putPolicy("alpha") }, 403, "lacks the admin scope"},
		{"choose token chooses anywhere", chooser, func() (string, string, any) { return choose("beta") }, 200, ""},
		{"choose token reads states", chooser, func() (string, string, any) { return state("alpha") }, 200, ""},
		{"choose token reads a policy's status", chooser, func() (string, string, any) { return getPolicy("beta") }, 200, `"revision"`},
		{"choose token cannot list policies", chooser, func() (string, string, any) { return "GET", "/v1/policies", nil }, 403, "lacks the admin scope"},
		{"choose token cannot post episodes", chooser, func() (string, string, any) { return episodes("alpha", "e3") }, 403, "lacks the ingest scope"},
		{"choose token cannot change policies", chooser, func() (string, string, any) { return putPolicy("alpha") }, 403, "lacks the admin scope"},
		{"limited admin changes its policy", adminAlpha, func() (string, string, any) { return putPolicy("alpha") }, 200, ""},
		{"limited admin, other policy", adminAlpha, func() (string, string, any) { return getPolicy("beta") }, 403, "limited to other policies"},
		{"limited admin cannot create policies elsewhere", adminAlpha, func() (string, string, any) { return putPolicy("gamma") }, 403, "limited to other policies"},
		{"limited admin cannot choose", adminAlpha, func() (string, string, any) { return choose("alpha") }, 403, "lacks the choose scope"},
		{"forged secret", forged, func() (string, string, any) { return getPolicy("alpha") }, 401, "unknown or revoked"},
		{"unknown token id", "qtk_987654_" + strings.Repeat("x", 43), func() (string, string, any) { return getPolicy("alpha") }, 401, "unknown or revoked"},
		{"not a token", "let-me-in", func() (string, string, any) { return getPolicy("alpha") }, 401, "not a qtally token"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			method, path, body := c.req()
			var data []byte
			ctype := ""
			if body != nil {
				data, ctype = must(json.Marshal(body)), "application/json"
			}
			// If-Match: * lets the PUT replace the existing policy's settings.
			r := s.as(c.secret).withHeader("If-Match", "*").send(method, path, ctype, data, false)
			if r.Status != c.want || !strings.Contains(string(r.Body), c.detail) {
				t.Fatalf("%s %s: %d %s, want %d mentioning %q", method, path, r.Status, r.Body, c.want, c.detail)
			}
			if c.want == 401 && !strings.Contains(r.Header.Get("WWW-Authenticate"), `error="invalid_token"`) {
				t.Fatalf("401 challenge %q lacks invalid_token", r.Header.Get("WWW-Authenticate"))
			}
			if c.want == 403 && !strings.Contains(r.Header.Get("WWW-Authenticate"), `error="insufficient_scope"`) {
				t.Fatalf("403 challenge %q lacks insufficient_scope", r.Header.Get("WWW-Authenticate"))
			}
		})
	}

	// A token limited to some policies lists only those.
	var list struct {
		Policies []struct {
			Name string `json:"name"`
		} `json:"policies"`
	}
	s.as(adminAlpha).call("GET", "/v1/policies", nil, 200).decode(t, &list)
	if len(list.Policies) != 1 || list.Policies[0].Name != "alpha" {
		t.Fatalf("limited admin lists %+v, want only alpha", list.Policies)
	}
	s.call("GET", "/v1/policies", nil, 200).decode(t, &list)
	if len(list.Policies) != 2 {
		t.Fatalf("unlimited admin lists %+v, want both", list.Policies)
	}

	// Any valid token reads the API document; the scheme name is case-insensitive.
	s.as(chooser).call("GET", "/v1/openapi.json", nil, 200)
	for _, header := range []string{"", "Basic dXNlcjpwYXNz", "Bearer", "Bearer ", "bearer " + chooser} {
		r := s.withAuthorization(header).send("GET", "/v1/policies/beta/states/s", "", nil, true)
		want := 401
		if strings.HasPrefix(header, "bearer qtk_") {
			want = 200
		}
		if r.Status != want {
			t.Fatalf("Authorization %q: %d %s, want %d", header, r.Status, r.Body, want)
		}
		if want == 401 && r.Header.Get("WWW-Authenticate") == "" {
			t.Fatalf("Authorization %q: 401 without WWW-Authenticate", header)
		}
	}
	// Probes and scrapers need no token.
	for _, path := range []string{"/livez", "/readyz", "/metrics"} {
		if r := s.as("").send("GET", path, "", nil, false); r.Status != 200 {
			t.Fatalf("%s without a token: %d %s", path, r.Status, r.Body)
		}
	}
}

// A revoked token is refused at once when the change notification arrives,
// and within --token-refresh when it does not. The first part runs with a
// reload every hour, so that only the notification can pass it.
func TestRevokedTokensStopWorking(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t), "serve", "--token-refresh", "1h")
	s.call("PUT", "/v1/policies/alpha", map[string]any{"actions": []string{"a", "b"}}, 201)

	secret := createToken(t, s.databaseURL, "--label", "to revoke", "--scope", "choose")
	s.as(secret).call("POST", "/v1/policies/alpha/choose", map[string]any{"state": "s", "mode": "explore"}, 200)
	out, err := s.qtally("token", "revoke", tokenID(t, secret))
	if err != nil || !strings.Contains(out, "revoked") {
		t.Fatalf("revoke: %v\n%s", err, out)
	}
	revoked := time.Now()
	waitFor(t, patience, "the revoked token to be refused", func() bool {
		return s.as(secret).send("POST", "/v1/policies/alpha/choose", "application/json", []byte(`{"state":"s","mode":"explore"}`), false).Status == 401
	})
	t.Logf("refused %v after revocation (notification)", time.Since(revoked))

	// Revoked behind the service's back, without a notification: the
	// periodic reload (1 s here, in a second process on the same database)
	// must still catch it.
	reloading := startService(t, s.databaseURL, "serve", "--token-refresh", "1s")
	quiet := createToken(t, s.databaseURL, "--label", "revoked quietly", "--scope", "choose")
	waitFor(t, patience, "a new token to be accepted", func() bool {
		return reloading.as(quiet).send("POST", "/v1/policies/alpha/choose", "application/json", []byte(`{"state":"s","mode":"explore"}`), false).Status == 200
	})
	pgtest.Exec(t, s.databaseURL, `UPDATE api_tokens SET revoked_at = now() WHERE token_id = $1`, must(strconv.ParseInt(tokenID(t, quiet), 10, 64)))
	revoked = time.Now()
	waitFor(t, patience, "the quietly revoked token to be refused", func() bool {
		return reloading.as(quiet).send("POST", "/v1/policies/alpha/choose", "application/json", []byte(`{"state":"s","mode":"explore"}`), false).Status == 401
	})
	t.Logf("refused %v after revocation (periodic reload every 1 s)", time.Since(revoked))

	// The list shows both revoked, and never a secret.
	out, err = s.qtally("token", "list")
	if err != nil {
		t.Fatal(err)
	}
	if strings.Count(out, "revoked 20") != 2 || strings.Contains(out, "qtk_") {
		t.Fatalf("token list:\n%s", out)
	}
	if _, err := s.qtally("token", "revoke", "424242"); err == nil || !strings.Contains(err.Error(), "no token with id 424242") {
		t.Fatalf("revoking an unknown id: %v", err)
	}
}

// A token over its rate gets 429 with Retry-After; other tokens do not.
func TestTokenRateLimit(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t), "serve", "--token-rate", "1000", "--token-burst", "1000")
	s.call("PUT", "/v1/policies/alpha", map[string]any{"actions": []string{"a", "b"}}, 201)
	slow := createToken(t, s.databaseURL, "--label", "slow", "--scope", "choose", "--rate", "0.2", "--burst", "3")
	body := []byte(`{"state":"s","mode":"explore"}`)
	for i := range 3 {
		if r := s.as(slow).send("POST", "/v1/policies/alpha/choose", "application/json", body, false); r.Status != 200 {
			t.Fatalf("request %d within the burst: %d %s", i, r.Status, r.Body)
		}
	}
	r := s.as(slow).send("POST", "/v1/policies/alpha/choose", "application/json", body, false)
	if r.Status != 429 || !strings.Contains(string(r.Body), "over its request rate") {
		t.Fatalf("request over the burst: %d %s", r.Status, r.Body)
	}
	// At 0.2 requests/s the next one is due about 5 s later.
	if wait, err := strconv.Atoi(r.Header.Get("Retry-After")); err != nil || wait < 4 || wait > 5 {
		t.Fatalf("Retry-After %q, want 4 or 5 seconds", r.Header.Get("Retry-After"))
	}
	// The server-wide rate applies to the harness's token, far from exhausted.
	s.call("POST", "/v1/policies/alpha/choose", map[string]any{"state": "s", "mode": "explore"}, 200)
}

// Token digests are keyed with the server's pepper, here read from a file:
// a token made under another pepper is refused, and the database holds no
// secret.
func TestTokenPepper(t *testing.T) {
	t.Parallel()
	db := pgtest.NewDatabase(t)
	file := filepath.Join(t.TempDir(), "pepper")
	if err := os.WriteFile(file, []byte("first pepper, kept in a file: 4f1c9e7a2b\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	fromFile := map[string]string{"DATABASE_URL": db, "QTALLY_TOKEN_PEPPER": "", "QTALLY_TOKEN_PEPPER_FILE": file}
	s := startServiceWith(t, db, fromFile, "serve")
	peppered := createTokenWith(t, fromFile, "--label", "peppered", "--scope", "admin")
	plain := createToken(t, db, "--label", "plain", "--scope", "admin")
	s.as(peppered).call("GET", "/v1/policies", nil, 200)
	if r := s.as(plain).send("GET", "/v1/policies", "", nil, false); r.Status != 401 {
		t.Fatalf("token made without the pepper: %d %s", r.Status, r.Body)
	}
	dump := pgtest.Dump(t, db, "api_tokens")
	for _, secret := range []string{peppered, plain} {
		if random := secret[len(secret)-43:]; strings.Contains(dump, random) {
			t.Fatalf("the database holds a secret:\n%s", dump)
		}
	}
}

// Without auth (serve --no-auth, and always in dev) requests need no
// token, and the process says so.
func TestNoAuthIsExplicitAndAnnounced(t *testing.T) {
	t.Parallel()
	for _, args := range [][]string{{"serve", "--no-auth"}, {"dev"}} {
		t.Run(args[0], func(t *testing.T) {
			s := startService(t, pgtest.NewDatabase(t), args...).as("")
			if r := s.send("GET", "/v1/policies", "", nil, true); r.Status != 200 {
				t.Fatalf("no token: %d %s", r.Status, r.Body)
			}
			if out := s.stdout.String(); !strings.Contains(out, "authentication is OFF") {
				t.Fatalf("stdout does not say auth is off:\n%s", out)
			}
		})
	}
	// Bad token commands say what is wrong.
	s := startService(t, pgtest.NewDatabase(t))
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"token", "create", "--label", "x", "--scope", "owner"}, `"owner" is not a scope`},
		{[]string{"token", "create", "--label", "x", "--scope", "choose", "--policy", "../etc"}, "not a valid policy name"},
		{[]string{"token", "create", "--label", "x", "--scope", "choose,choose"}, `repeats "choose"`},
		{[]string{"token", "create", "--label", "x", "--scope", "choose", "--burst", "5"}, "only together with a rate"},
		{[]string{"token", "revoke", "first"}, "not a token id"},
	} {
		if _, err := s.qtally(c.args...); err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%v: %v, want an error mentioning %q", c.args, err, c.want)
		}
	}
}
