package systemtest

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"maps"
	"math"
	"math/rand/v2"
	"net/http"
	"os/exec"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	dto "github.com/prometheus/client_model/go"

	"github.com/qtally/qtally/storage/pgtest"
)

// feedLearningWork gives a service's every metric something to count:
// trained episodes, a duplicate, a rejected batch, and choices greedy and
// exploring, in states known and unknown.
func feedLearningWork(t *testing.T, s *service, policy string, rng *rand.Rand, round int) []episodeJSON {
	t.Helper()
	actions := []string{"call", "email", "wait"}
	batch := randomBatch(rng, fmt.Sprintf("round%d", round), 20, actions)
	s.call("POST", "/v1/policies/"+policy+"/episodes", map[string]any{"episodes": batch}, 202)
	s.call("POST", "/v1/policies/"+policy+"/episodes", map[string]any{"episodes": batch[:1]}, 202)
	bad := []episodeJSON{{ID: fmt.Sprintf("bad%d", round), Steps: []stepJSON{{State: "day 1/bucket", Action: "fax", Reward: 1}}}}
	s.call("POST", "/v1/policies/"+policy+"/episodes", map[string]any{"episodes": bad}, 400)
	for i := range 40 {
		mode := []string{"greedy", "explore"}[i%2]
		body := must(json.Marshal(map[string]any{"state": fmt.Sprintf("day %d/bucket", i%6), "mode": mode}))
		// Greedy has no answer (409) in a state no action was tried in yet.
		if r := s.send("POST", "/v1/policies/"+policy+"/choose", "application/json", body, false); r.Status != 200 && (mode != "greedy" || r.Status != 409) {
			t.Fatalf("choose %s: %d %s", body, r.Status, r.Body)
		}
	}
	s.call("POST", "/v1/policies/"+policy+"/choose", map[string]any{"state": "never seen", "mode": "explore"}, 200)
	return batch
}

// The exposition of a fed service must pass promtool's checks, and each
// role must export its own figures: the in-memory copy's from API
// processes, the database's table-wide figures from the worker only. Every
// metric the alerting rules query must be exported by one of them.
func TestMetricsPassPromtoolAndFollowRoles(t *testing.T) {
	t.Parallel()
	tool := promtool(t)
	db := pgtest.NewDatabase(t)
	apiOnly := startService(t, db, "serve", "--no-worker")
	worker := startService(t, db, "worker")
	policy := "collections"
	apiOnly.call("PUT", "/v1/policies/"+policy, map[string]any{"actions": []string{"call", "email", "wait"}, "epsilon": 0.5}, 201)
	rng := rand.New(rand.NewPCG(5, 6))
	feedLearningWork(t, apiOnly, policy, rng, 0)
	// One episode kept open and ended, so that the open-episode events exist.
	apiOnly.record(policy, "kept-1", 0, "day 0")
	apiOnly.call("POST", "/v1/policies/"+policy+"/open-episodes/kept-1/rewards", map[string]any{"reward": 1}, 200)
	apiOnly.call("POST", "/v1/policies/"+policy+"/open-episodes/kept-1/end", nil, 200)
	st := apiOnly.waitTrained(policy, 21)
	waitFor(t, patience, "the API's copy to reach the trained revision", func() bool {
		_, f := apiOnly.scrape()
		return gaugeOf(f, "qtally_q_copy_revision", policy) >= float64(st.Revision)
	})

	exported := map[string]bool{}
	defer func() {
		for _, name := range alertRuleMetrics(t) {
			if !exported[name] {
				t.Errorf("%s alerts on %s, which no role exports", alertRules, name)
			}
		}
	}()
	for _, proc := range []struct {
		name     string
		s        *service
		has, not []string
	}{
		{"api", apiOnly,
			[]string{"qtally_episodes_received_total", "qtally_episodes_duplicate_total", "qtally_episodes_rejected_total",
				"qtally_choices_total", "qtally_q_copy_age_seconds", "qtally_q_copy_revision", "qtally_q_states",
				"qtally_q_pairs", "qtally_q_pair_visits", "qtally_q_coverage_ratio", "qtally_q_coverage_min_visits",
				"qtally_http_request_duration_seconds", "qtally_decisions_recorded_total", "qtally_open_episode_rewards_added_total",
				"qtally_open_episodes_closed_total", "qtally_decision_batch_size", "qtally_decision_batch_duration_seconds"},
			[]string{"qtally_backlog_episodes", "qtally_backlog_oldest_age_seconds", "qtally_episodes_trained_total",
				"qtally_open_episodes", "qtally_open_episode_oldest_age_seconds", "qtally_open_episodes_closed_stored"}},
		{"worker", worker,
			[]string{"qtally_episodes_trained_total", "qtally_steps_trained_total", "qtally_q_updates_total",
				"qtally_q_update_size", "qtally_greedy_changes_total", "qtally_episode_return",
				"qtally_training_batch_duration_seconds", "qtally_training_last_batch_timestamp_seconds",
				"qtally_training_errors_total", "qtally_backlog_episodes", "qtally_backlog_oldest_age_seconds",
				"qtally_table_scrape_success", "qtally_open_episodes", "qtally_open_episode_oldest_age_seconds",
				"qtally_open_episode_longest_idle_seconds", "qtally_open_episodes_closed_stored"},
			[]string{"qtally_q_copy_age_seconds", "qtally_q_pairs", "qtally_choices_total"}},
	} {
		t.Run(proc.name, func(t *testing.T) {
			text, families := proc.s.scrape()
			for name := range families {
				exported[name] = true
			}
			for _, name := range proc.has {
				if families[name] == nil {
					t.Errorf("%s does not export %s", proc.name, name)
				}
			}
			for _, name := range proc.not {
				if families[name] != nil {
					t.Errorf("%s exports %s, which another role owns", proc.name, name)
				}
			}
			for name, f := range families {
				if f.GetType() == dto.MetricType_SUMMARY && strings.HasPrefix(name, "qtally_") {
					t.Errorf("%s is a summary; qtally exports histograms", name)
				}
				for _, m := range f.GetMetric() {
					for _, l := range m.GetLabel() {
						if n := l.GetName(); n == "state" || n == "action" {
							t.Errorf("%s has a %s label: unbounded", name, n)
						}
					}
				}
			}
			// promtool reads the exposition on stdin and prints every lint
			// problem it finds; an empty output and exit 0 is a pass.
			cmd := exec.Command(tool, "check", "metrics")
			cmd.Stdin = strings.NewReader(text)
			out, err := cmd.CombinedOutput()
			if err != nil || len(bytes.TrimSpace(out)) > 0 {
				t.Fatalf("promtool check metrics on the %s's /metrics: %v\n%s", proc.name, err, out)
			}
		})
	}
}

// visitReference is what the visit metrics must say of a table: the
// distribution of N(s,a) over visited pairs, and coverage as the share of
// the pairs of seen states (actions x states) with at least k visits.
type visitReference struct {
	states, pairs int
	visits        int64
	atMost        map[float64]uint64
	coverage      float64
}

func referenceVisits(table map[pair]estimate, actions int, k int64, bounds []float64) visitReference {
	ref := visitReference{atMost: map[float64]uint64{}}
	states := map[string]bool{}
	covered := 0
	for p, e := range table {
		states[p.state] = true
		ref.pairs++
		ref.visits += e.visits
		if e.visits >= k {
			covered++
		}
		for _, b := range bounds {
			if float64(e.visits) <= b {
				ref.atMost[b]++
			}
		}
	}
	ref.states = len(states)
	ref.coverage = float64(covered) / float64(actions*ref.states)
	return ref
}

// The visit distribution, state and pair counts and coverage exported from
// the in-memory copy must equal those counted from the trained table, after
// the first load and after later batches move pairs between buckets.
func TestVisitMetricsFollowTheTable(t *testing.T) {
	t.Parallel()
	const k = 3
	s := startService(t, pgtest.NewDatabase(t), "serve", "--coverage-visits", strconv.Itoa(k), "--batch-episodes", "9")
	actions := []string{"call", "email", "wait"}
	policy := "reminders"
	s.call("PUT", "/v1/policies/"+policy, map[string]any{"actions": actions, "visit": "every"}, 201)
	rng := rand.New(rand.NewPCG(7, 8))
	reference := map[pair]estimate{}
	var posted int64
	for round := range 3 {
		batch := randomBatch(rng, fmt.Sprintf("r%d", round), 10+10*round, actions)
		// A state new in each round, with one of its actions tried.
		batch = append(batch, episodeJSON{ID: fmt.Sprintf("r%d-new", round), Steps: []stepJSON{
			{State: fmt.Sprintf("week %d/first contact", round), Action: actions[round], Reward: 1}}})
		s.call("POST", "/v1/policies/"+policy+"/episodes", map[string]any{"episodes": batch}, 202)
		posted += int64(len(batch))
		sequentialReference(batch, 0.9, 0.1, false, reference)
		st := s.waitTrained(policy, posted)
		// Choosing loads the copy on the first round; later rounds arrive by
		// notification.
		s.call("POST", "/v1/policies/"+policy+"/choose", map[string]any{"state": "day 0/bucket", "mode": "explore"}, 200)
		var families map[string]*dto.MetricFamily
		waitFor(t, patience, "the copy to reach the trained revision", func() bool {
			_, families = s.scrape()
			return gaugeOf(families, "qtally_q_copy_revision", policy) == float64(st.Revision)
		})

		hist := sample(families, "qtally_q_pair_visits", map[string]string{"policy": policy}).GetHistogram()
		var bounds []float64
		for _, b := range hist.GetBucket() {
			bounds = append(bounds, b.GetUpperBound())
		}
		ref := referenceVisits(reference, len(actions), k, bounds)
		if got := gaugeOf(families, "qtally_q_states", policy); got != float64(ref.states) {
			t.Errorf("round %d: qtally_q_states %v, table has %d states", round, got, ref.states)
		}
		if got := gaugeOf(families, "qtally_q_pairs", policy); got != float64(ref.pairs) {
			t.Errorf("round %d: qtally_q_pairs %v, table has %d visited pairs", round, got, ref.pairs)
		}
		if hist.GetSampleCount() != uint64(ref.pairs) || hist.GetSampleSum() != float64(ref.visits) {
			t.Errorf("round %d: visit histogram count %d sum %v, table %d pairs with %d visits",
				round, hist.GetSampleCount(), hist.GetSampleSum(), ref.pairs, ref.visits)
		}
		// Buckets are cumulative: le=b counts the pairs with at most b visits
		// (Prometheus text exposition format, histogram).
		for _, b := range hist.GetBucket() {
			if b.GetCumulativeCount() != ref.atMost[b.GetUpperBound()] {
				t.Errorf("round %d: bucket le=%v holds %d pairs, table has %d", round, b.GetUpperBound(), b.GetCumulativeCount(), ref.atMost[b.GetUpperBound()])
			}
		}
		if got := gaugeOf(families, "qtally_q_coverage_ratio", policy); math.Abs(got-ref.coverage) > 1e-12 {
			t.Errorf("round %d: coverage %v, table %v", round, got, ref.coverage)
		}
		if got := families["qtally_q_coverage_min_visits"].GetMetric()[0].GetGauge().GetValue(); got != k {
			t.Errorf("coverage threshold exported as %v, configured %d", got, k)
		}
		t.Logf("round %d: %d states, %d pairs, %d visits, coverage(k=%d) %.3f", round, ref.states, ref.pairs, ref.visits, k, ref.coverage)
	}
	if !slices.ContainsFunc(slices.Collect(maps.Values(reference)), func(e estimate) bool { return e.visits > k }) {
		t.Fatal("the data never took a pair past the coverage threshold; the check proved nothing")
	}
}

// seedPairs writes n learned pairs of a policy straight into the table, as
// the worker would have left them, spread over 4 actions per state with
// visit counts from 1 to about 1000 (many distinct counts, the costlier
// case for the copy's distribution).
func seedPairs(b *testing.B, databaseURL, policy string, n int) {
	b.Helper()
	ctx, conn := context.Background(), connectDB(b, databaseURL)
	if _, err := conn.Exec(ctx, `
		INSERT INTO q_values (policy_id, state, action, q, visits, last_delta, updated_at, revision)
		SELECT p.policy_id, 'account ' || (i / 4), (i % 4)::int2, random(), 1 + floor(1000 * random() ^ 4)::bigint, 0, now(), 1
		FROM policies p, generate_series(0, $2 - 1) AS i WHERE p.name = $1`, policy, n); err != nil {
		b.Fatal(err)
	}
	if _, err := conn.Exec(ctx, `UPDATE policies SET revision = 1 WHERE name = $1`, policy); err != nil {
		b.Fatal(err)
	}
}

// BenchmarkScrapeMetrics measures one GET /metrics of an API process whose
// in-memory copy holds n pairs: the scrape must not grow with the table.
func BenchmarkScrapeMetrics(b *testing.B) {
	sizes := []int{1_000, 1_000_000}
	if testing.Short() { // make test runs every benchmark once, smaller
		sizes = []int{1_000, 20_000}
	}
	for _, n := range sizes {
		b.Run(fmt.Sprintf("pairs=%d", n), func(b *testing.B) {
			db := pgtest.NewDatabase(b)
			s := startService(b, db, "serve", "--no-worker")
			policy := "billing"
			s.call("PUT", "/v1/policies/"+policy, map[string]any{"actions": []string{"call", "email", "letter", "wait"}}, 201)
			seedPairs(b, db, policy, n)
			loadStart := time.Now()
			s.call("POST", "/v1/policies/"+policy+"/choose", map[string]any{"state": "account 1", "mode": "explore"}, 200)
			_, families := s.scrape()
			if got := gaugeOf(families, "qtally_q_pairs", policy); got != float64(n) {
				b.Fatalf("copy holds %v pairs, seeded %d", got, n)
			}
			b.Logf("loaded %d pairs into the copy in %v", n, time.Since(loadStart))
			var size int
			b.ResetTimer()
			for b.Loop() {
				resp, err := s.client.Get(s.URL + "/metrics")
				if err != nil {
					b.Fatal(err)
				}
				var buf bytes.Buffer
				_, err = buf.ReadFrom(resp.Body)
				resp.Body.Close()
				if err != nil || resp.StatusCode != http.StatusOK {
					b.Fatalf("GET /metrics: %d %v", resp.StatusCode, err)
				}
				size = buf.Len()
			}
			b.ReportMetric(float64(size), "bytes/scrape")
		})
	}
}
