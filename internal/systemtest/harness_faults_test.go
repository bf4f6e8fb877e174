package systemtest

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math/rand/v2"
	"net/http"
	"sync"
	"testing"
	"time"
)

// Helpers of the fault tests: real processes, real PostgreSQL, and clients
// that keep a ledger of what the service accepted.

// faultActions and faultStates are what randomBatch draws from.
var faultActions = []string{"retry", "wait", "remind"}

func faultStates() []string {
	states := make([]string, 6)
	for i := range states {
		states[i] = fmt.Sprintf("day %d/bucket", i)
	}
	return states
}

// ledger records, per policy, every episode the service answered 202 for,
// and counts what else it answered. Safe for concurrent clients.
type ledger struct {
	authorization string
	mu            sync.Mutex
	accepted      map[string]map[string]episodeJSON
	requests      int
	// unavailable counts 503 answers (each then retried with the same ids);
	// inDoubt counts episodes a 202 reported as duplicates after a 503 for
	// the same batch: stored by the attempt whose answer was lost.
	unavailable, inDoubt int
	failures             []string
}

// newLedger keeps account of posts made with authorization (an
// Authorization header value).
func newLedger(authorization string) *ledger {
	return &ledger{accepted: map[string]map[string]episodeJSON{}, authorization: authorization}
}

func (l *ledger) fail(format string, args ...any) {
	l.mu.Lock()
	defer l.mu.Unlock()
	l.failures = append(l.failures, fmt.Sprintf(format, args...))
}

// check fails the test with what went wrong in the clients.
func (l *ledger) check(t testing.TB) {
	t.Helper()
	l.mu.Lock()
	defer l.mu.Unlock()
	if len(l.failures) > 0 {
		t.Fatalf("%d client failures, first: %s", len(l.failures), l.failures[0])
	}
}

func (l *ledger) episodes(policy string) map[string]episodeJSON {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.accepted[policy]
}

func (l *ledger) counts() (requests, unavailable, inDoubt, accepted int) {
	l.mu.Lock()
	defer l.mu.Unlock()
	for _, eps := range l.accepted {
		accepted += len(eps)
	}
	return l.requests, l.unavailable, l.inDoubt, accepted
}

// post sends one batch until the service answers 202, retrying after a 503
// with the same ids as a client should (the answer must carry
// Retry-After). Any other answer, or a transport error, is a failure. It
// gives up quietly when ctx ends.
func (l *ledger) post(ctx context.Context, client *http.Client, baseURL, policy string, eps []episodeJSON) bool {
	body := must(json.Marshal(map[string]any{"episodes": eps}))
	retried := false
	for ctx.Err() == nil {
		// A post once sent runs to its answer even when the clients are told
		// to stop, so that every episode the service stored is accounted for.
		req := must(http.NewRequestWithContext(context.WithoutCancel(ctx), http.MethodPost, baseURL+"/v1/policies/"+policy+"/episodes", bytes.NewReader(body)))
		req.Header.Set("Content-Type", "application/json")
		resp, err := client.Do(req)
		if err != nil {
			if ctx.Err() == nil {
				l.fail("post %s: %v", eps[0].ID, err)
			}
			return false
		}
		data, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		l.mu.Lock()
		l.requests++
		l.mu.Unlock()
		switch resp.StatusCode {
		case http.StatusAccepted:
			var res struct{ Accepted, Duplicates int }
			if err := json.Unmarshal(data, &res); err != nil || res.Accepted+res.Duplicates != len(eps) || (!retried && res.Duplicates > 0) {
				l.fail("post %s: 202 %s for %d fresh episodes", eps[0].ID, data, len(eps))
				return false
			}
			l.mu.Lock()
			if l.accepted[policy] == nil {
				l.accepted[policy] = map[string]episodeJSON{}
			}
			for _, ep := range eps {
				l.accepted[policy][ep.ID] = ep
			}
			l.inDoubt += res.Duplicates
			l.mu.Unlock()
			return true
		case http.StatusServiceUnavailable:
			if resp.Header.Get("Retry-After") == "" {
				l.fail("post %s: 503 without Retry-After: %s", eps[0].ID, data)
				return false
			}
			l.mu.Lock()
			l.unavailable++
			l.mu.Unlock()
			retried = true
			// Sooner than Retry-After asks, to see more of the outage.
			select {
			case <-ctx.Done():
			case <-time.After(100 * time.Millisecond):
			}
		default:
			l.fail("post %s: %d %s", eps[0].ID, resp.StatusCode, data)
			return false
		}
	}
	return false
}

// postUntil posts random batches of 1-8 episodes to the policies in turn,
// spread over the given processes, until ctx ends or n batches went
// through (n = 0: no limit).
func (l *ledger) postUntil(ctx context.Context, seed uint64, name string, n int, urls []string, policies []policySpec) {
	rng := rand.New(rand.NewPCG(seed, seed+1))
	client := tokenClient(l.authorization, 30*time.Second)
	for i := 0; (n == 0 || i < n) && ctx.Err() == nil; i++ {
		ps := policies[i%len(policies)]
		batch := randomBatch(rng, fmt.Sprintf("%s-%d", name, i), 1+rng.IntN(8), faultActions)
		l.post(ctx, client, urls[rng.IntN(len(urls))], ps.name, batch)
		time.Sleep(time.Duration(rng.IntN(15)) * time.Millisecond)
	}
}

// verifyLearnedOnce waits until the policy has no backlog and checks that
// the database holds exactly the accepted episodes, once each, all trained,
// and that the Q table the API serves equals the sequential reference over
// them in stored (seq) order: nothing lost, nothing learned twice, per-policy
// order kept.
func verifyLearnedOnce(t *testing.T, s *service, databaseURL string, ps policySpec, accepted map[string]episodeJSON) {
	t.Helper()
	waitFor(t, time.Minute, ps.name+" to train its backlog", func() bool {
		st := s.status(ps.name)
		return st.Backlog == 0 && st.Episodes >= int64(len(accepted))
	})
	ids, untrained := storedOrder(t, databaseURL, ps.name)
	if len(untrained) != 0 {
		t.Fatalf("%s: %d stored episodes untrained", ps.name, len(untrained))
	}
	if len(ids) != len(accepted) {
		t.Fatalf("%s: %d episodes stored, %d accepted", ps.name, len(ids), len(accepted))
	}
	ordered := make([]episodeJSON, len(ids))
	for i, id := range ids {
		ep, ok := accepted[id]
		if !ok {
			t.Fatalf("%s: stored episode %q was never accepted", ps.name, id)
		}
		ordered[i] = ep
	}
	reference := map[pair]estimate{}
	sequentialReference(ordered, ps.gamma, ps.alpha, ps.visit == "first", reference)
	compareTables(t, s.table(ps.name, faultStates()), reference)
}
