package systemtest

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"net/http"
	"os/exec"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/storage/pgtest"
)

// distributionExceptions are the indexes that do not lead with policy_id,
// and why each is acceptable when tables are distributed by policy.
var distributionExceptions = map[string]string{
	// One row per policy, looked up by name once per request; the table is
	// small enough to keep whole on every node (a reference table), where a
	// unique index on another column is allowed.
	"policies_name_key": "policies",
	// API tokens belong to the service, not to a policy: like policies, a
	// small table kept whole on every node.
	"api_tokens_pkey": "api_tokens",
	// Page sessions belong to signed-in browsers, not to a policy: a small
	// table read by key, kept whole on every node like the tokens.
	"page_sessions_pkey": "page_sessions",
	// The audit log belongs to the service: an entry may name several
	// policies or none, and it is read across them; it stays on the
	// coordinator, written once per admin request.
	"audit_log_pkey":   "audit_log",
	"audit_log_policy": "audit_log",
	// The migration tool's bookkeeping; it stays on the coordinator.
	"goose_db_version_pkey": "goose_db_version",
}

// TestEveryKeyLeadsWithPolicy reads the migrated schema's catalogue: every
// table has a primary key, and every index (primary keys included) has
// policy_id as its first column, so each table can be distributed by
// policy with no schema change. The exceptions are listed above.
func TestEveryKeyLeadsWithPolicy(t *testing.T) {
	t.Parallel()
	ctx := context.Background()
	conn, err := pgx.Connect(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)

	rows, err := conn.Query(ctx, `
		SELECT c.relname, i.relname, ix.indisprimary, coalesce(a.attname, '')
		FROM pg_index ix
		JOIN pg_class i ON i.oid = ix.indexrelid
		JOIN pg_class c ON c.oid = ix.indrelid
		JOIN pg_namespace n ON n.oid = c.relnamespace
		-- indkey[0] is 0 for an expression: then no column leads.
		LEFT JOIN pg_attribute a ON a.attrelid = c.oid AND a.attnum = ix.indkey[0]
		WHERE n.nspname = current_schema()
		ORDER BY 1, 2`)
	if err != nil {
		t.Fatal(err)
	}
	type index struct {
		table, name string
		primary     bool
		lead        string
	}
	indexes, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (index, error) {
		var ix index
		return ix, r.Scan(&ix.table, &ix.name, &ix.primary, &ix.lead)
	})
	if err != nil {
		t.Fatal(err)
	}
	tables, err := pgx.CollectRows(must(conn.Query(ctx, `
		SELECT c.relname FROM pg_class c JOIN pg_namespace n ON n.oid = c.relnamespace
		WHERE n.nspname = current_schema() AND c.relkind IN ('r', 'p') ORDER BY 1`)), pgx.RowTo[string])
	if err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"policies", "episodes", "q_values"} {
		if !slices.Contains(tables, want) {
			t.Fatalf("the migrated schema has tables %v, missing %s", tables, want)
		}
	}

	hasPrimary := map[string]bool{}
	seenExceptions := map[string]bool{}
	for _, ix := range indexes {
		hasPrimary[ix.table] = hasPrimary[ix.table] || ix.primary
		if table, ok := distributionExceptions[ix.name]; ok && table == ix.table {
			seenExceptions[ix.name] = true
			continue
		}
		if ix.lead != "policy_id" {
			t.Errorf("index %s on %s leads with %q, not policy_id: the table could not be distributed by policy without a schema change", ix.name, ix.table, ix.lead)
		}
	}
	for _, table := range tables {
		if !hasPrimary[table] {
			t.Errorf("table %s has no primary key", table)
		}
	}
	for name := range distributionExceptions {
		if !seenExceptions[name] {
			t.Errorf("distributionExceptions lists %s, which the schema no longer has: remove it", name)
		}
	}
}

// sighting is a revision seen at a time.
type sighting struct {
	revision int64
	// at is when the answer arrived (for choose) or when the previous
	// status request, which still showed an older revision, was sent (for
	// the policy status): the commit happened after it.
	at time.Time
}

// TestSeveralAPIsAndWorkersShareOneDatabase runs two API processes and
// three workers on one database under a client load that posts episodes
// for several policies and chooses on both APIs. Every revision a policy
// commits must reach choose on every API; the learned tables must equal a
// sequential replay of what was posted (so no policy was ever trained by
// two workers at once, and no episode twice), and the workers together
// must have trained each episode exactly once. How long a commit takes to
// reach choose is a figure, not a check: BenchmarkCommitToChooseAcrossProcesses
// reports its percentiles.
func TestSeveralAPIsAndWorkersShareOneDatabase(t *testing.T) {
	t.Parallel()
	lags := runSharedDatabaseFleet(t, 30)
	t.Logf("%d commits followed on every API; from commit to choose at most (bounds, not exact) %v at the median, %v at worst",
		len(lags), percentile(lags, 0.5), percentile(lags, 1))
}

// BenchmarkCommitToChooseAcrossProcesses runs the fleet of
// TestSeveralAPIsAndWorkersShareOneDatabase and reports how long each
// commit took to reach choose on every API (an upper bound per commit:
// from the last status read that still showed the older revision).
//
//	go test -run '^$' -bench CommitToChooseAcrossProcesses -benchtime 1x .
func BenchmarkCommitToChooseAcrossProcesses(b *testing.B) {
	requests := 30
	if testing.Short() {
		requests = 10
	}
	var lags []time.Duration
	for range b.N {
		lags = append(lags, runSharedDatabaseFleet(b, requests)...)
	}
	b.ReportMetric(percentile(lags, 0.5).Seconds()*1000, "p50-ms")
	b.ReportMetric(percentile(lags, 0.99).Seconds()*1000, "p99-ms")
	b.ReportMetric(percentile(lags, 1).Seconds()*1000, "max-ms")
}

// percentile returns the q-quantile (nearest rank) of durations.
func percentile(d []time.Duration, q float64) time.Duration {
	if len(d) == 0 {
		return 0
	}
	s := slices.Clone(d)
	slices.Sort(s)
	i := int(math.Ceil(q*float64(len(s)))) - 1
	return s[max(i, 0)]
}

// runSharedDatabaseFleet runs the load described at
// TestSeveralAPIsAndWorkersShareOneDatabase with requests posts per policy,
// checks what must hold, and returns, per commit and API, how long the
// commit took to reach choose.
func runSharedDatabaseFleet(t testing.TB, requests int) []time.Duration {
	bin := buildBinary(t)
	env := map[string]string{
		"DATABASE_URL": pgtest.NewDatabase(t), "QTALLY_LISTEN": "127.0.0.1:0",
		// The poll is a fallback: notifications carry the revisions.
		"QTALLY_POLL_INTERVAL": "2s", "QTALLY_BATCH_EPISODES": "40", "QTALLY_DB_MAX_CONNS": "6",
	}
	var apis []*service
	for range 2 {
		apis = append(apis, startProcess(t, bin, env, "serve", "--no-worker").api())
	}
	var workers []*process
	for range 3 {
		// Small batches give many commits to follow, as a steady trickle
		// of traffic does; under a backlog the default batches grow large.
		workers = append(workers, startProcess(t, bin, env, "worker", "--batch-episodes", "20"))
	}

	// The health check the images use: 0 when ready, 1 when not.
	for _, u := range []string{apis[0].URL, apis[1].URL, workers[0].URL} {
		if out, err := exec.Command(bin, "healthcheck", "--url", u+"/readyz").CombinedOutput(); err != nil {
			t.Fatalf("qtally healthcheck of %s: %v\n%s", u, err, out)
		}
	}
	err := exec.Command(bin, "healthcheck", "--url", apis[0].URL+"/no-such-page").Run()
	var exit *exec.ExitError
	if !errors.As(err, &exit) || exit.ExitCode() != 1 {
		t.Fatalf("qtally healthcheck of a 404 exited with %v, want status 1", err)
	}

	const (
		policies    = 4
		perRequest  = 20 // episodes
		gamma       = 0.9
		alpha       = 0.2
		chooseState = "day 0/bucket"
	)
	actions := []string{"hold", "nudge", "boost"}
	names := make([]string, policies)
	for i := range names {
		names[i] = fmt.Sprintf("fleet-%c", 'a'+i)
		apis[i%2].call("PUT", "/v1/policies/"+names[i], map[string]any{"actions": actions, "gamma": gamma, "alpha": alpha, "visit": "every"}, 201)
	}

	ctx, stopPolling := context.WithCancel(context.Background())
	defer stopPolling()
	var mu sync.Mutex
	var failures []string
	fail := func(format string, args ...any) {
		mu.Lock()
		defer mu.Unlock()
		failures = append(failures, fmt.Sprintf(format, args...))
	}
	client := tokenClient(apis[0].authorization, 10*time.Second)
	var polling sync.WaitGroup

	// Choosers: each API, each policy, one request after another.
	chosen := make([][][]sighting, len(apis)) // [api][policy]
	for a := range apis {
		chosen[a] = make([][]sighting, policies)
		for p := range policies {
			polling.Go(func() {
				body := must(json.Marshal(map[string]any{"state": chooseState, "mode": "explore"}))
				last := int64(-1)
				for ctx.Err() == nil {
					var c struct {
						Revision int64 `json:"revision"`
					}
					if err := postJSON(ctx, client, apis[a].URL+"/v1/policies/"+names[p]+"/choose", body, &c); err != nil {
						if ctx.Err() == nil {
							fail("choose on API %d: %v", a, err)
						}
						return
					}
					if c.Revision > last {
						last = c.Revision
						mu.Lock()
						chosen[a][p] = append(chosen[a][p], sighting{c.Revision, time.Now()})
						mu.Unlock()
					}
					time.Sleep(2 * time.Millisecond)
				}
			})
		}
	}
	// Watchers: each policy's committed revision, from either API.
	committed := make([][]sighting, policies)
	// watched is the last revision each watcher saw, for the main goroutine.
	watched := make([]atomic.Int64, policies)
	for p := range policies {
		polling.Go(func() {
			last := int64(-1)
			prevStart := time.Now()
			for i := 0; ctx.Err() == nil; i++ {
				start := time.Now()
				var st policyStatus
				if err := getJSON(ctx, client, apis[i%2].URL+"/v1/policies/"+names[p], &st); err != nil {
					if ctx.Err() == nil {
						fail("policy status: %v", err)
					}
					return
				}
				if st.Revision > last {
					last = st.Revision
					committed[p] = append(committed[p], sighting{st.Revision, prevStart})
					watched[p].Store(last)
				}
				prevStart = start
				time.Sleep(5 * time.Millisecond)
			}
		})
	}

	// Posters: one per policy, each request after the previous answer, so
	// arrival order is posting order and a sequential replay is exact.
	references := make([]map[pair]estimate, policies)
	var posting sync.WaitGroup
	for p := range policies {
		references[p] = map[pair]estimate{}
		posting.Go(func() {
			rng := rand.New(rand.NewPCG(uint64(p), 7))
			for r := range requests {
				batch := randomBatch(rng, fmt.Sprintf("r%d", r), perRequest, actions)
				body := must(json.Marshal(map[string]any{"episodes": batch}))
				var res struct{ Accepted int }
				if err := postJSON(ctx, client, apis[r%2].URL+"/v1/policies/"+names[p]+"/episodes", body, &res); err != nil || res.Accepted != perRequest {
					fail("posting to %s: accepted %d of %d: %v", names[p], res.Accepted, perRequest, err)
					return
				}
				sequentialReference(batch, gamma, alpha, false, references[p])
			}
		})
	}
	posting.Wait()
	for _, name := range names {
		apis[0].waitTrained(name, int64(requests*perRequest))
	}
	final := make([]int64, policies)
	for p, name := range names {
		final[p] = apis[1].status(name).Revision
	}
	waitFor(t, time.Minute, "every API to choose from the final revisions", func() bool {
		mu.Lock()
		defer mu.Unlock()
		for a := range apis {
			for p := range policies {
				s := chosen[a][p]
				if len(s) == 0 || s[len(s)-1].revision < final[p] {
					return false
				}
			}
		}
		return true
	})
	waitFor(t, patience, "the watchers to see the final revisions too", func() bool {
		for p := range policies {
			if watched[p].Load() < final[p] {
				return false
			}
		}
		return true
	})
	stopPolling()
	polling.Wait()
	if len(failures) > 0 {
		t.Fatalf("load failed: %s", strings.Join(failures, "; "))
	}

	// Every commit reaches choose on every API.
	var lags []time.Duration
	for p := range policies {
		if len(committed[p]) < 5 {
			t.Fatalf("%s: saw only %d revisions commit; the load is too small to check anything", names[p], len(committed[p]))
		}
		for _, c := range committed[p] {
			if c.revision == 0 {
				continue
			}
			for a := range apis {
				i := slices.IndexFunc(chosen[a][p], func(s sighting) bool { return s.revision >= c.revision })
				if i < 0 {
					t.Fatalf("API %d never chose from revision %d of %s", a, c.revision, names[p])
				}
				lags = append(lags, chosen[a][p][i].at.Sub(c.at))
			}
		}
	}

	// The tables equal a sequential replay, and each API's memory holds them.
	states := make([]string, 6)
	for i := range states {
		states[i] = fmt.Sprintf("day %d/bucket", i)
	}
	for p, name := range names {
		table := apis[p%2].table(name, states)
		compareTables(t, table, references[p])
		for _, st := range states {
			best, unique := greedyOf(table, st, actions)
			for a, api := range apis {
				var c struct {
					Action   string `json:"action"`
					Revision int64  `json:"revision"`
				}
				api.call("POST", "/v1/policies/"+name+"/choose", map[string]any{"state": st, "mode": "greedy"}, 200).decode(t, &c)
				if c.Revision != final[p] || (unique && c.Action != best) {
					t.Errorf("API %d, %s, %q: greedy %s at revision %d; the table says %s at revision %d", a, name, st, c.Action, c.Revision, best, final[p])
				}
			}
		}
	}

	// The workers shared the work and trained every episode once.
	var total float64
	for i, w := range workers {
		trained := metricSum(t, w.URL, "qtally_episodes_trained_total")
		t.Logf("worker %d trained %.0f episodes", i, trained)
		if trained == 0 {
			t.Errorf("worker %d trained nothing: the work was not spread", i)
		}
		total += trained
	}
	if want := float64(policies * requests * perRequest); total != want {
		t.Errorf("the workers trained %.0f episodes between them; %.0f were posted", total, want)
	}
	return lags
}

// greedyOf returns a state's best action and whether it is the only best.
func greedyOf(table map[pair]estimate, state string, actions []string) (string, bool) {
	best, unique := "", false
	bestQ := math.Inf(-1)
	for _, a := range actions {
		e, tried := table[pair{state, a}]
		if !tried {
			continue // an untried action is never greedy (by default)
		}
		q := e.q
		switch {
		case q > bestQ:
			best, bestQ, unique = a, q, true
		case q == bestQ:
			unique = false
		}
	}
	return best, unique
}

func postJSON(ctx context.Context, client *http.Client, url string, body []byte, out any) error {
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, url, bytes.NewReader(body))
	if err != nil {
		return err
	}
	req.Header.Set("Content-Type", "application/json")
	return doJSON(client, req, out)
}

func getJSON(ctx context.Context, client *http.Client, url string, out any) error {
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, url, nil)
	if err != nil {
		return err
	}
	return doJSON(client, req, out)
}

func doJSON(client *http.Client, req *http.Request, out any) error {
	resp, err := client.Do(req)
	if err != nil {
		return err
	}
	defer resp.Body.Close()
	data, err := io.ReadAll(resp.Body)
	if err != nil {
		return err
	}
	if resp.StatusCode/100 != 2 {
		return fmt.Errorf("%s %s: %s: %s", req.Method, req.URL.Path, resp.Status, data)
	}
	return json.Unmarshal(data, out)
}
