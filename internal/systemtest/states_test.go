package systemtest

import (
	"cmp"
	"fmt"
	"math"
	"math/rand/v2"
	"net/url"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/storage/pgtest"
)

type stateItem struct {
	State        string `json:"state"`
	Known        bool   `json:"known"`
	Visits       int64  `json:"visits"`
	GreedyAction string `json:"greedy_action"`
	Actions      []struct {
		Action    string    `json:"action"`
		Q         float64   `json:"q"`
		Visits    int64     `json:"visits"`
		LastDelta float64   `json:"last_delta"`
		UpdatedAt time.Time `json:"updated_at"`
	} `json:"actions"`
	Drift     float64   `json:"drift"`
	UpdatedAt time.Time `json:"updated_at"`
	GreedyGap float64   `json:"greedy_gap"`
}

type statesPage struct {
	States     []stateItem `json:"states"`
	NextCursor string      `json:"next_cursor"`
}

// reminderEpisodes makes episodes of an invoice-reminder scenario: which
// nudge to send an overdue account. Lower-numbered accounts come up more
// often, so visit counts differ and also tie; a few state names carry
// characters that HTML and URLs treat specially.
func reminderEpisodes(rng *rand.Rand, prefix string, n int, actions []string) []episodeJSON {
	states := []string{`<b>overdue & "large"</b>`, "tier 'gold'/90d", "a+b?c=d#e"}
	for i := range 30 {
		states = append(states, fmt.Sprintf("account %02d", i))
	}
	eps := make([]episodeJSON, n)
	for i := range eps {
		steps := make([]stepJSON, 1+rng.IntN(4))
		for j := range steps {
			k := min(int(rng.ExpFloat64()*8), len(states)-1)
			steps[j] = stepJSON{State: states[k], Action: actions[rng.IntN(len(actions))], Reward: float64(rng.IntN(21) - 5)}
		}
		eps[i] = episodeJSON{ID: fmt.Sprintf("%s-%d", prefix, i), Steps: steps}
	}
	return eps
}

// listAll pages through a listing and returns its items in order.
func (s *service) listAll(policy, sort string, limit int) ([]stateItem, int) {
	var all []stateItem
	cursor := ""
	pages := 0
	for {
		q := url.Values{"sort": {sort}, "limit": {fmt.Sprint(limit)}}
		if cursor != "" {
			q.Set("cursor", cursor)
		}
		var page statesPage
		s.call("GET", "/v1/policies/"+policy+"/states?"+q.Encode(), nil, 200).decode(s.t, &page)
		pages++
		if len(page.States) > limit {
			s.t.Fatalf("page of %d states with limit %d", len(page.States), limit)
		}
		all = append(all, page.States...)
		if page.NextCursor == "" {
			return all, pages
		}
		if pages > 1000 {
			s.t.Fatal("listing does not end")
		}
		cursor = page.NextCursor
	}
}

func TestStateListingPagesAndSorts(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t), "serve", "--batch-episodes", "9")
	actions := []string{"wait", "email", "call"}
	s.call("PUT", "/v1/policies/reminders", map[string]any{"actions": actions, "alpha": 0.3, "gamma": 0.8}, 201)
	rng := rand.New(rand.NewPCG(5, 6))
	var posted int64
	for b := range 4 {
		batch := reminderEpisodes(rng, fmt.Sprint("b", b), 25, actions)
		s.call("POST", "/v1/policies/reminders/episodes", map[string]any{"episodes": batch}, 202)
		posted += int64(len(batch))
	}
	s.waitTrained("reminders", posted)
	var counts struct {
		States int64 `json:"states"`
	}
	s.call("GET", "/v1/policies/reminders", nil, 200).decode(t, &counts)

	// The reference: every state read one by one through the single-state
	// route, and the figures each order sorts on worked out from it.
	visits, _ := s.listAll("reminders", "visits", 1000)
	if len(visits) == 0 {
		t.Fatal("no states listed")
	}
	type ref struct {
		visits  int64
		drift   float64
		updated time.Time
		item    stateItem
	}
	refs := map[string]ref{}
	var names []string
	for _, it := range visits {
		var one stateItem
		s.call("GET", "/v1/policies/reminders/states/"+url.PathEscape(it.State), nil, 200).decode(t, &one)
		r := ref{item: one}
		best, second := math.Inf(-1), math.Inf(-1)
		for _, a := range one.Actions {
			r.visits += a.Visits
			if a.Visits > 0 {
				r.drift = math.Max(r.drift, math.Abs(a.LastDelta))
				if a.UpdatedAt.After(r.updated) {
					r.updated = a.UpdatedAt
				}
			}
			if a.Q > best {
				best, second = a.Q, best
			} else if a.Q > second {
				second = a.Q
			}
		}
		if it.Visits != r.visits || it.GreedyAction != one.GreedyAction || !it.Known {
			t.Fatalf("state %q listed with visits %d, greedy %q; alone it has %d, %q", it.State, it.Visits, it.GreedyAction, r.visits, one.GreedyAction)
		}
		if math.Abs(it.GreedyGap-(best-second)) > 1e-12 || math.Abs(it.Drift-r.drift) > 0 || !it.UpdatedAt.Equal(r.updated) {
			t.Fatalf("state %q: gap %v drift %v updated %v; want %v %v %v", it.State, it.GreedyGap, it.Drift, it.UpdatedAt, best-second, r.drift, r.updated)
		}
		for i, a := range it.Actions {
			if b := one.Actions[i]; a.Action != b.Action || a.Q != b.Q || a.Visits != b.Visits || a.LastDelta != b.LastDelta || !a.UpdatedAt.Equal(b.UpdatedAt) {
				t.Fatalf("state %q action %d listed as %+v, alone %+v", it.State, i, a, one.Actions[i])
			}
		}
		refs[it.State] = r
		names = append(names, it.State)
	}
	if int64(len(refs)) != counts.States {
		t.Fatalf("listing has %d distinct states, the policy %d", len(refs), counts.States)
	}
	byName := func(a, b string) int { return strings.Compare(a, b) }
	orders := map[string]func(a, b string) int{
		"visits":  func(a, b string) int { return cmp.Or(cmp.Compare(refs[b].visits, refs[a].visits), byName(a, b)) },
		"drift":   func(a, b string) int { return cmp.Or(cmp.Compare(refs[b].drift, refs[a].drift), byName(a, b)) },
		"updated": func(a, b string) int { return cmp.Or(refs[b].updated.Compare(refs[a].updated), byName(a, b)) },
	}
	for sort, order := range orders {
		want := slices.Clone(names)
		slices.SortFunc(want, order)
		for _, limit := range []int{1, 4, 7, len(names), 1000} {
			items, pages := s.listAll("reminders", sort, limit)
			got := make([]string, len(items))
			for i, it := range items {
				got[i] = it.State
			}
			if !slices.Equal(got, want) {
				t.Fatalf("sort %s, limit %d: listed\n%q\nwant\n%q", sort, limit, got, want)
			}
			if wantPages := max(1, (len(want)+limit-1)/limit); pages != wantPages {
				t.Fatalf("sort %s, limit %d: %d pages for %d states", sort, limit, pages, len(want))
			}
		}
	}

	// Bad parameters name the field at fault.
	var first statesPage
	s.call("GET", "/v1/policies/reminders/states?sort=drift&limit=2", nil, 200).decode(t, &first)
	for _, c := range []struct{ query, field, says string }{
		{"sort=popularity", "sort", `"popularity" is not a sort order`},
		{"limit=0", "limit", "from 1 to 1000"},
		{"limit=1001", "limit", "from 1 to 1000"},
		{"limit=ten", "limit", "whole number"},
		{"cursor=not-a-cursor", "cursor", "not a cursor"},
		{"sort=visits&cursor=" + first.NextCursor, "cursor", `sorted by "drift"`},
	} {
		r := s.send("GET", "/v1/policies/reminders/states?"+c.query, "", nil, true)
		var p struct {
			Status int `json:"status"`
			Errors []struct {
				Field   string `json:"field"`
				Message string `json:"message"`
			} `json:"errors"`
		}
		r.decode(t, &p)
		if r.Status != 400 || len(p.Errors) != 1 || p.Errors[0].Field != c.field || !strings.Contains(p.Errors[0].Message, c.says) {
			t.Fatalf("?%s: %d %s; want 400 naming %s and saying %q", c.query, r.Status, r.Body, c.field, c.says)
		}
	}
	s.call("GET", "/v1/policies/nobody/states", nil, 404)

	// A policy with nothing learned lists nothing.
	s.call("PUT", "/v1/policies/fresh", map[string]any{"actions": actions}, 201)
	var empty statesPage
	s.call("GET", "/v1/policies/fresh/states", nil, 200).decode(t, &empty)
	if len(empty.States) != 0 || empty.NextCursor != "" {
		t.Fatalf("fresh policy lists %+v", empty)
	}
}
