package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math/rand/v2"
	"net/http"
	"net/url"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
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

// processEnv is the environment of a qtally process on databaseURL.
func processEnv(databaseURL string) map[string]string {
	return map[string]string{"DATABASE_URL": databaseURL, "QTALLY_LISTEN": "127.0.0.1:0",
		"QTALLY_POLL_INTERVAL": "300ms", "QTALLY_LOG_FORMAT": "text"}
}

// withAppName tags a process's database sessions, so the test can find
// them in pg_stat_activity and pg_locks.
func withAppName(t testing.TB, databaseURL, name string) string {
	t.Helper()
	u, err := url.Parse(databaseURL)
	if err != nil {
		t.Fatalf("parse database URL: %v", err)
	}
	q := u.Query()
	q.Set("application_name", name)
	u.RawQuery = q.Encode()
	return u.String()
}

// api is the OpenAPI-checked client of startService, pointed at a process.
func (p *process) api() *service {
	return &service{t: p.t, URL: p.URL, stderr: p.stderr, router: openAPIRouter(p.t),
		client: &http.Client{Timeout: 30 * time.Second}, authorization: p.authorization}
}

// signal sends sig to the process.
func (p *process) signal(sig syscall.Signal) {
	p.t.Helper()
	if err := p.cmd.Process.Signal(sig); err != nil {
		p.t.Fatalf("signal %v: %v", sig, err)
	}
}

// metric reads one unlabelled sample, or the sum over a metric's labels,
// from the process's /metrics.
func (p *process) metric(name string) float64 {
	p.t.Helper()
	resp, err := http.Get(p.URL + "/metrics")
	if err != nil {
		p.t.Fatalf("GET /metrics: %v", err)
	}
	defer resp.Body.Close()
	sum := 0.0
	sc := bufio.NewScanner(resp.Body)
	for sc.Scan() {
		line := sc.Text()
		rest, ok := strings.CutPrefix(line, name)
		if !ok || (rest[0] != ' ' && rest[0] != '{') {
			continue
		}
		fields := strings.Fields(rest[strings.LastIndexByte(rest, '}')+1:])
		v, err := strconv.ParseFloat(fields[0], 64)
		if err != nil {
			p.t.Fatalf("metric line %q: %v", line, err)
		}
		sum += v
	}
	return sum
}

// policySpec is a policy of a fault test and the settings its reference
// computation needs.
type policySpec struct {
	name         string
	gamma, alpha float64
	visit        string
}

func (ps policySpec) create(s *service) {
	s.call("PUT", "/v1/policies/"+ps.name, map[string]any{"actions": faultActions, "gamma": ps.gamma, "alpha": ps.alpha, "visit": ps.visit}, 201)
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

// choice is the part of a choose answer the fault tests look at.
type choice struct {
	Action   string  `json:"action"`
	Revision int64   `json:"revision"`
	CopyAge  float64 `json:"copy_age_seconds"`
}

// choose asks for an action, exploring so that a state not trained yet has
// an answer too; anything but 200 is an error.
func choose(client *http.Client, baseURL, policy, state string) (choice, error) {
	body := must(json.Marshal(map[string]any{"state": state, "mode": "explore"}))
	resp, err := client.Post(baseURL+"/v1/policies/"+policy+"/choose", "application/json", bytes.NewReader(body))
	if err != nil {
		return choice{}, fmt.Errorf("choose: %w", err)
	}
	defer resp.Body.Close()
	data, _ := io.ReadAll(resp.Body)
	var c choice
	if resp.StatusCode != http.StatusOK {
		return c, fmt.Errorf("choose: %d %s", resp.StatusCode, data)
	}
	if err := json.Unmarshal(data, &c); err != nil {
		return c, fmt.Errorf("choose: %w: %s", err, data)
	}
	return c, nil
}

// storedOrder reads a policy's stored episode ids in the order the
// database assigned them (seq), which is the order training must follow,
// and the ids not trained yet. Test-only SQL: the API has no such listing.
func storedOrder(t testing.TB, databaseURL, policy string) (ids, untrained []string) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	conn, err := pgx.Connect(ctx, databaseURL)
	if err != nil {
		t.Fatalf("connect: %v", err)
	}
	defer conn.Close(ctx)
	rows, err := conn.Query(ctx, `
		SELECT e.episode_id, e.seq > p.trained_through FROM episodes e JOIN policies p USING (policy_id)
		WHERE p.name = $1
		ORDER BY e.seq`, policy)
	if err != nil {
		t.Fatalf("read stored episodes: %v", err)
	}
	var id string
	var pending bool
	_, err = pgx.ForEachRow(rows, []any{&id, &pending}, func() error {
		ids = append(ids, id)
		if pending {
			untrained = append(untrained, id)
		}
		return nil
	})
	if err != nil {
		t.Fatalf("read stored episodes: %v", err)
	}
	return ids, untrained
}

// lockWaits counts the sessions of the database waiting for a lock.
func lockWaits(t testing.TB, conn *pgx.Conn) int {
	t.Helper()
	var n int
	if err := conn.QueryRow(context.Background(), `SELECT count(*) FROM pg_stat_activity
		WHERE datname = current_database() AND wait_event_type = 'Lock'`).Scan(&n); err != nil {
		t.Fatalf("count lock waits: %v", err)
	}
	return n
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
