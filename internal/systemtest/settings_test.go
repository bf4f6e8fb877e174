package systemtest

import (
	"encoding/json"
	"net/url"
	"strings"
	"testing"

	"github.com/qtally/qtally/storage/pgtest"
)

// patch sends a JSON merge patch.
func (s *service) patch(path, body string, wantStatus int) reply {
	s.t.Helper()
	r := s.send("PATCH", path, "application/merge-patch+json", []byte(body), false)
	if r.Status != wantStatus {
		s.t.Fatalf("PATCH %s: status %d, want %d: %s", path, r.Status, wantStatus, r.Body)
	}
	return r
}

type policySettings struct {
	Actions            []string `json:"actions"`
	Alpha              float64  `json:"alpha"`
	Epsilon            float64  `json:"epsilon"`
	EpsilonMin         float64  `json:"epsilon_min"`
	EpsilonDecayVisits float64  `json:"epsilon_decay_visits"`
}

type settingsChange struct {
	ID         int64  `json:"id"`
	ChangedAt  string `json:"changed_at"`
	Kind       string `json:"kind"`
	TokenID    *int64 `json:"token_id"`
	TokenLabel string `json:"token_label"`
	Fields     []struct {
		Field string          `json:"field"`
		Old   json.RawMessage `json:"old"`
		New   json.RawMessage `json:"new"`
	} `json:"fields"`
}

type settingsHistory struct {
	Changes    []settingsChange `json:"changes"`
	NextCursor string           `json:"next_cursor"`
}

// A PUT replaces every setting and needs the ETag of the settings it
// replaces; a merge patch changes only what it names. The counter-example:
// a PUT naming alpha and epsilon but not the decay silently reset the decay.
func TestSettingsChangesNeedTheCurrentETagAndAreRecorded(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	const base = "/v1/policies/renewals"
	actions := []string{"text_reminder", "wait", "write_off"}
	created := s.call("PUT", base, map[string]any{"actions": actions, "alpha": 0.1, "epsilon": 0.3,
		"epsilon_min": 0.05, "epsilon_decay_visits": 20}, 201)
	etag := created.Header.Get("ETag")
	if etag == "" || !strings.HasPrefix(etag, `"`) {
		t.Fatalf("PUT answered ETag %q, want a strong entity tag", etag)
	}
	if got := s.call("GET", base, nil, 200).Header.Get("ETag"); got != etag {
		t.Fatalf("GET ETag %q, PUT's %q", got, etag)
	}
	read := func() policySettings {
		var p policySettings
		s.call("GET", base, nil, 200).decode(t, &p)
		return p
	}
	unchanged := func(when string) {
		t.Helper()
		if p := read(); p.Alpha != 0.1 || p.Epsilon != 0.3 || p.EpsilonMin != 0.05 || p.EpsilonDecayVisits != 20 {
			t.Fatalf("%s: settings changed to %+v", when, p)
		}
	}

	// The counter-example: without If-Match the PUT is refused and the decay stays.
	partial := map[string]any{"actions": actions, "alpha": 0.2, "epsilon": 0.3}
	r := s.call("PUT", base, partial, 428)
	if !strings.Contains(string(r.Body), "If-Match") || !strings.Contains(string(r.Body), "#precondition-required") {
		t.Fatalf("428 does not say what to send: %s", r.Body)
	}
	unchanged("PUT without If-Match")
	r = s.withHeader("If-Match", `"stale"`).call("PUT", base, partial, 412)
	if !strings.Contains(string(r.Body), "#precondition-failed") || !strings.Contains(string(r.Body), strings.Trim(etag, `"`)) {
		t.Fatalf("412 does not name the current ETag: %s", r.Body)
	}
	unchanged("PUT with a stale If-Match")
	// A PUT with If-Match for a policy that does not exist is refused too.
	s.withHeader("If-Match", etag).call("PUT", "/v1/policies/nobody", partial, 412)

	// A merge patch changes what it names and keeps the rest.
	patched := s.patch(base, `{"alpha":0.2,"epsilon":0.25}`, 200)
	etag2 := patched.Header.Get("ETag")
	if etag2 == "" || etag2 == etag {
		t.Fatalf("PATCH answered ETag %q after %q", etag2, etag)
	}
	if p := read(); p.Alpha != 0.2 || p.Epsilon != 0.25 || p.EpsilonMin != 0.05 || p.EpsilonDecayVisits != 20 {
		t.Fatalf("after the patch: %+v", p)
	}
	// With If-Match a patch must see the current settings.
	s.withHeader("If-Match", etag).patch(base, `{"alpha":0.5}`, 412)
	// An invalid result is refused, naming the field; nothing changes.
	r = s.patch(base, `{"epsilon_min":0.9}`, 400)
	if !strings.Contains(string(r.Body), `"field":"epsilon_min"`) {
		t.Fatalf("invalid patch: %s", r.Body)
	}
	// (The document refuses the unknown field too, so this one is sent raw.)
	r = s.send("PATCH", base, "application/merge-patch+json", []byte(`{"alpah":0.9}`), true)
	if r.Status != 400 || !strings.Contains(string(r.Body), "alpah") {
		t.Fatalf("unknown field in a patch: %s", r.Body)
	}
	s.patch("/v1/policies/nobody", `{"alpha":0.5}`, 404)
	if r := s.send("PATCH", base, "application/json", []byte(`{"alpha":0.5}`), true); r.Status != 415 {
		t.Fatalf("PATCH as application/json: %d %s", r.Status, r.Body)
	}
	// null removes a setting: it takes its default again.
	s.withHeader("If-Match", etag2).patch(base, `{"epsilon_decay_visits":null}`, 200)
	if p := read(); p.EpsilonDecayVisits != 0 || p.EpsilonMin != 0.05 {
		t.Fatalf("after removing the decay: %+v", p)
	}

	// A PUT with the current ETag replaces every setting, as documented.
	current := s.call("GET", base, nil, 200).Header.Get("ETag")
	s.withHeader("If-Match", current).call("PUT", base, partial, 200)
	if p := read(); p.Alpha != 0.2 || p.Epsilon != 0.3 || p.EpsilonMin != 0 {
		t.Fatalf("after the replacing PUT: %+v", p)
	}
	// The same ETag cannot be used twice: the second writer saw old settings.
	s.withHeader("If-Match", current).call("PUT", base, partial, 412)

	// The history lists every change, newest first, with old and new values
	// and the token that made it.
	var h settingsHistory
	s.call("GET", base+"/settings-history", nil, 200).decode(t, &h)
	if len(h.Changes) != 4 {
		t.Fatalf("history has %d changes, want 4 (create, patch, patch, replace): %+v", len(h.Changes), h)
	}
	kinds := []string{h.Changes[0].Kind, h.Changes[1].Kind, h.Changes[2].Kind, h.Changes[3].Kind}
	if strings.Join(kinds, ",") != "replace,patch,patch,create" {
		t.Fatalf("kinds %v", kinds)
	}
	fields := func(c settingsChange) map[string]string {
		m := map[string]string{}
		for _, f := range c.Fields {
			m[f.Field] = string(f.Old) + "->" + string(f.New)
		}
		return m
	}
	if got := fields(h.Changes[2]); len(got) != 2 || got["alpha"] != "0.1->0.2" || got["epsilon"] != "0.3->0.25" {
		t.Fatalf("first patch recorded as %v", got)
	}
	if got := fields(h.Changes[0]); got["epsilon_min"] != "0.05->0" || got["epsilon"] != "0.25->0.3" {
		t.Fatalf("replace recorded as %v", got)
	}
	if got := fields(h.Changes[3]); got["epsilon_decay_visits"] != "null->20" {
		t.Fatalf("create recorded as %v", got)
	}
	for _, c := range h.Changes {
		if c.TokenID == nil || c.TokenLabel != "test harness" || c.ChangedAt == "" {
			t.Fatalf("change %d does not say who made it and when: %+v", c.ID, c)
		}
	}
	// Paged.
	var first, second settingsHistory
	s.call("GET", base+"/settings-history?limit=3", nil, 200).decode(t, &first)
	if len(first.Changes) != 3 || first.NextCursor == "" {
		t.Fatalf("first page: %+v", first)
	}
	s.call("GET", base+"/settings-history?limit=3&cursor="+url.QueryEscape(first.NextCursor), nil, 200).decode(t, &second)
	if len(second.Changes) != 1 || second.Changes[0].Kind != "create" || second.NextCursor != "" {
		t.Fatalf("second page: %+v", second)
	}
	s.call("GET", base+"/settings-history?cursor=nonsense", nil, 400)

	// The policy page shows the changes.
	page := string(s.send("GET", "/policies/renewals", "", nil, false).Body)
	for _, want := range []string{"Settings changes", "epsilon_decay_visits", "test harness", "replace"} {
		if !strings.Contains(page, want) {
			t.Errorf("the policy page lacks %q", want)
		}
	}
}
