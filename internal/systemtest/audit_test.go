package systemtest

import (
	"fmt"
	"slices"
	"strings"
	"testing"

	"github.com/qtally/qtally/storage/pgtest"
)

// readAudit reads the whole audit log page by page, newest first.
func readAudit(t *testing.T, s *service, query string, pageSize int) []auditEntry {
	t.Helper()
	var all []auditEntry
	path := fmt.Sprintf("/v1/audit?limit=%d%s", pageSize, query)
	for range 100 {
		var page auditPage
		s.call("GET", path, nil, 200).decode(t, &page)
		if len(page.Entries) > pageSize {
			t.Fatalf("a page of %d holds %d entries", pageSize, len(page.Entries))
		}
		all = append(all, page.Entries...)
		if page.NextBefore == nil {
			return all
		}
		path = fmt.Sprintf("/v1/audit?limit=%d&before=%d%s", pageSize, *page.NextBefore, query)
	}
	t.Fatal("the audit log does not end")
	return nil
}

// Every admin request with a valid token is in the audit log with who made
// it, what it did, to which policies and how it ended, refusals included;
// so are token commands. Other requests are not. Admins read it page by
// page; a token limited to some policies reads only their entries.
func TestAuditLogRecordsAdminActions(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	alphaAdmin := createToken(t, s.databaseURL, "--label", "alpha owner", "--scope", "admin", "--policy", "alpha")
	chooser := createToken(t, s.databaseURL, "--label", "front end", "--scope", "choose")
	before := readAudit(t, s, "", 100)

	s.call("PUT", "/v1/policies/alpha", map[string]any{"actions": []string{"a", "b"}}, 201)
	s.call("PUT", "/v1/policies/beta", map[string]any{"actions": []string{"a", "b"}}, 201)
	s.post("alpha", oneStep("e1", "s", "a", 1))
	s.waitTrained("alpha", 1)
	s.call("POST", "/v1/policies/alpha/snapshots", map[string]any{"name": "first"}, 201)
	s.call("POST", "/v1/policies/alpha/replays", map[string]any{"target": "alpha-copy"}, 202)
	s.as(alphaAdmin).call("GET", "/v1/policies/beta", nil, 403)
	s.as(alphaAdmin).call("GET", "/v1/policies/alpha/diff?to_policy=beta", nil, 403)
	s.as(alphaAdmin).withHeader("If-Match", "*").call("PUT", "/v1/policies/alpha", map[string]any{"actions": []string{"a", "b"}, "epsilon": 0.2}, 200)
	s.as(chooser).call("PUT", "/v1/policies/alpha", map[string]any{"actions": []string{"a", "b"}}, 403)
	s.as(chooser).call("POST", "/v1/policies/alpha/choose", map[string]any{"state": "s"}, 200)
	if r := s.as("").send("GET", "/v1/policies/alpha", "", nil, true); r.Status != 401 {
		t.Fatalf("no token: %d", r.Status)
	}
	revoked := createToken(t, s.databaseURL, "--label", "short-lived", "--scope", "choose")
	if _, err := s.qtally("token", "revoke", tokenID(t, revoked)); err != nil {
		t.Fatal(err)
	}

	all := readAudit(t, s, "", 3)
	if !slices.IsSortedFunc(all, func(a, b auditEntry) int { return int(b.ID - a.ID) }) {
		t.Fatalf("entries are not newest first: %+v", all)
	}
	seen := map[int64]bool{}
	for _, e := range all {
		if seen[e.ID] {
			t.Fatalf("entry %d is on two pages", e.ID)
		}
		seen[e.ID] = true
	}
	// The reads of the log before are entries too; leave them out.
	var got []string
	for _, e := range all[:len(all)-len(before)] {
		if e.Route == "/v1/audit" {
			continue
		}
		who := e.TokenLabel
		if e.TokenID != nil {
			who += fmt.Sprintf(" #%d", *e.TokenID)
		}
		got = append(got, fmt.Sprintf("%s|%s %s|%s|%s|%s|%d", who, e.Method, e.Route, e.Policy, strings.Join(e.PoliciesNamed, ","), e.Object, e.Status))
	}
	slices.Reverse(got)
	harness, alpha, front := "test harness #"+tokenID(t, s.authorization[len("Bearer "):]), "alpha owner #"+tokenID(t, alphaAdmin), "front end #"+tokenID(t, chooser)
	short := tokenID(t, revoked)
	want := []string{
		harness + "|PUT /v1/policies/:policy|alpha|alpha||201",
		harness + "|PUT /v1/policies/:policy|beta|beta||201",
		// waitTrained reads the policy until it is trained: any number of these.
		harness + "|GET /v1/policies/:policy|alpha|alpha||200",
		harness + "|POST /v1/policies/:policy/snapshots|alpha|alpha|/v1/policies/alpha/snapshots/first|201",
		harness + "|POST /v1/policies/:policy/replays|alpha|alpha,alpha-copy|/v1/policies/alpha/replays/1|202",
		alpha + "|GET /v1/policies/:policy|beta|beta||403",
		alpha + "|GET /v1/policies/:policy/diff|alpha|alpha,beta||403",
		alpha + "|PUT /v1/policies/:policy|alpha|alpha||200",
		front + "|PUT /v1/policies/:policy|alpha|alpha||403",
		"qtally token create|CLI token create|||token " + short + "|201",
		"qtally token revoke|CLI token revoke|||token " + short + "|200",
	}
	got = slices.CompactFunc(got, func(a, b string) bool { return a == b && a == want[2] })
	if !slices.Equal(got, want) {
		t.Fatalf("audit log:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
	for _, e := range all[:len(all)-len(before)] {
		if e.Via == "command line" && e.TokenID != nil || e.Via == "api" && e.TokenID == nil {
			t.Fatalf("entry %+v: via and token disagree", e)
		}
	}
	// The token commands of the setup are there too.
	if e := before[len(before)-1]; e.Via != "command line" || e.Route != "token create" {
		t.Fatalf("the oldest entry is %+v, want the harness token's creation", e)
	}

	// A token limited to alpha reads the entries that name alpha alone.
	limited := readAudit(t, s.as(alphaAdmin), "", 2)
	if len(limited) == 0 {
		t.Fatal("the limited token reads no entries")
	}
	for _, e := range limited {
		if e.Policy != "alpha" || !slices.Equal(e.PoliciesNamed, []string{"alpha"}) {
			t.Fatalf("a token limited to alpha reads %+v", e)
		}
	}
	s.as(alphaAdmin).call("GET", "/v1/audit?policy=beta", nil, 403)
	for _, e := range readAudit(t, s, "&policy=beta", 50) {
		if e.Policy != "beta" {
			t.Fatalf("?policy=beta gives %+v", e)
		}
	}
	for _, q := range []string{"limit=0", "limit=1001", "before=x", "before=0", "policy=..%2Fx"} {
		if r := s.send("GET", "/v1/audit?"+q, "", nil, true); r.Status != 400 {
			t.Fatalf("?%s: %d %s, want 400", q, r.Status, r.Body)
		}
	}
	// Reading the log is an admin action too.
	var page auditPage
	s.call("GET", "/v1/audit?limit=1", nil, 200).decode(t, &page)
	if e := page.Entries[0]; e.Route != "/v1/audit" || e.Status != 400 || !strings.Contains(e.Path, "policy=") {
		t.Fatalf("the newest entry is %+v, want the refused read of the log", e)
	}
}
