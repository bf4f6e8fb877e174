package systemtest

import (
	"net/url"
	"testing"

	"github.com/qtally/qtally/storage/pgtest"
)

// State names with path-significant characters round-trip through the
// path-escaped state route.
func TestStateNamesSurviveThePath(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	s.call("PUT", "/v1/policies/esc", map[string]any{"actions": []string{"a", "b"}}, 201)
	states := []string{"plain", "a/b", "100%", "a%2Fb", "sp ace", "pipe|x", "q?x=1", "hash#1", "ünï"}
	var eps []episodeJSON
	for i, st := range states {
		eps = append(eps, episodeJSON{ID: st + string(rune('0'+i)), Steps: []stepJSON{{State: st, Action: "b", Reward: 1}}})
	}
	s.call("POST", "/v1/policies/esc/episodes", map[string]any{"episodes": eps}, 202)
	s.waitTrained("esc", int64(len(states)))
	for _, st := range states {
		var v struct {
			State string `json:"state"`
			Known bool   `json:"known"`
		}
		s.call("GET", "/v1/policies/esc/states/"+url.PathEscape(st), nil, 200).decode(t, &v)
		if v.State != st || !v.Known {
			t.Errorf("state %q came back as %q known=%v", st, v.State, v.Known)
		}
	}
}
