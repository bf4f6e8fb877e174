package systemtest

import (
	"context"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"net/http"
	"os"
	"slices"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/localpg"
)

// Shape of the load BenchmarkOnePostgres applies; deploy/SCALING.md quotes
// its figures.
const (
	benchPolicies     = 4
	benchStates       = 25_000 // per policy
	benchStepsPerEp   = 10
	benchPerRequest   = 100 // episodes per POST
	benchPosters      = 8
	benchWorkers      = 2
	benchChoosers     = 16
	benchPhaseTimeout = 5 * time.Minute
)

// BenchmarkOnePostgres measures how far one durable PostgreSQL carries
// qtally on this machine, with every process on loopback: an API process
// (serve --no-worker) takes episodes from concurrent clients with no worker
// running; then workers train the backlog; then clients choose; then the
// tables are weighed. Run:
//
//	go test -run '^$' -bench OnePostgres -benchtime 1x -timeout 30m .
func BenchmarkOnePostgres(b *testing.B) {
	// -short (make test runs every benchmark once) keeps the shape and
	// shrinks the volume, so the benchmark is exercised without the minutes
	// a measurement takes.
	benchRequests, benchChooseFor := 2000, 5*time.Second
	if testing.Short() {
		benchRequests, benchChooseFor = 20, time.Second
	}
	ctx := context.Background()
	srv, err := localpg.Start(ctx, localpg.Options{Durable: true, Port: -1})
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(func() { _ = srv.Stop() })
	if _, err = storage.Migrate(ctx, srv.URL()); err != nil {
		b.Fatal(err)
	}
	bin := buildBinary(b)
	env := map[string]string{"DATABASE_URL": srv.URL(), "QTALLY_LISTEN": "127.0.0.1:0", "QTALLY_LOG_FORMAT": "json"}
	api := startProcess(b, bin, env, "serve", "--no-worker").api()
	client := &http.Client{Timeout: time.Minute,
		Transport: authorizing{authorization: api.authorization, base: &http.Transport{MaxIdleConnsPerHost: 64}}}

	actions := []string{"keep", "call", "mail", "skip"}
	names := make([]string, benchPolicies)
	for i := range names {
		names[i] = fmt.Sprintf("bench-%d", i)
		api.call("PUT", "/v1/policies/"+names[i], map[string]any{"actions": actions, "alpha": 0.05, "gamma": 0.95}, 201)
	}

	// Bodies are encoded before the clock starts, so the client spends its
	// share of the two cores on sending, not on encoding.
	rng := rand.New(rand.NewPCG(1, 2))
	bodies := make([][]byte, benchRequests)
	for r := range bodies {
		eps := make([]episodeJSON, benchPerRequest)
		for i := range eps {
			steps := make([]stepJSON, benchStepsPerEp)
			for j := range steps {
				steps[j] = stepJSON{State: fmt.Sprintf("s%05d", rng.IntN(benchStates)), Action: actions[rng.IntN(len(actions))], Reward: float64(rng.IntN(21) - 10)}
			}
			eps[i] = episodeJSON{ID: fmt.Sprintf("r%d-e%d", r, i), Steps: steps}
		}
		bodies[r] = must(json.Marshal(map[string]any{"episodes": eps}))
	}

	// Ingest: posters share the requests, round robin over policies.
	var next atomic.Int64
	var failed atomic.Value
	start := time.Now()
	var wg sync.WaitGroup
	for range benchPosters {
		wg.Go(func() {
			for {
				r := int(next.Add(1)) - 1
				if r >= benchRequests || time.Since(start) > benchPhaseTimeout {
					return
				}
				var res struct{ Accepted int }
				postErr := postJSON(ctx, client, api.URL+"/v1/policies/"+names[r%benchPolicies]+"/episodes", bodies[r], &res)
				if postErr != nil || res.Accepted != benchPerRequest {
					failed.Store(fmt.Sprintf("request %d: accepted %d: %v", r, res.Accepted, postErr))
					return
				}
			}
		})
	}
	wg.Wait()
	ingest := time.Since(start)
	if f := failed.Load(); f != nil {
		b.Fatal(f)
	}
	episodes := float64(benchRequests * benchPerRequest)
	steps := episodes * benchStepsPerEp

	// Training: workers drain the backlog.
	start = time.Now()
	var workers []*process
	for range benchWorkers {
		workers = append(workers, startProcess(b, bin, env, "worker"))
	}
	// The workers' own counters say when they are done; the status route
	// would count rows, taking PostgreSQL time from the workers.
	trainedBy := func(name string) float64 {
		var sum float64
		for _, w := range workers {
			sum += metricSum(b, w.URL, name)
		}
		return sum
	}
	waitForQuietly(b, benchPhaseTimeout, "the backlog to be trained", func() bool {
		return trainedBy("qtally_episodes_trained_total") >= episodes
	})
	train := time.Since(start)
	pairUpdates := trainedBy("qtally_q_updates_total")
	batchSeconds := trainedBy("qtally_training_batch_duration_seconds_sum")
	batches := trainedBy("qtally_training_batch_duration_seconds_count")
	for _, name := range names {
		if st := api.status(name); st.Backlog != 0 {
			b.Fatalf("%s: backlog %d after the workers counted every episode trained", name, st.Backlog)
		}
	}

	// Choosing, on a fresh API process so that its memory growth is the
	// tables it loads: closed-loop clients over known and unknown states.
	chooserProc := startProcess(b, bin, env, "serve", "--no-worker")
	rssBefore := residentBytes(b, chooserProc.cmd.Process.Pid)
	// The first choice of a policy loads its table; that is not choosing.
	for _, name := range names {
		var res struct{ Action string }
		if err = postJSON(ctx, client, chooserProc.URL+"/v1/policies/"+name+"/choose", []byte(`{"state":"s00000","mode":"explore"}`), &res); err != nil {
			b.Fatal(err)
		}
	}
	var answered atomic.Int64
	latencies := make([][]time.Duration, benchChoosers)
	start = time.Now()
	for c := range benchChoosers {
		wg.Go(func() {
			rng := rand.New(rand.NewPCG(uint64(c), 3))
			for time.Since(start) < benchChooseFor {
				body := fmt.Appendf(nil, `{"state":"s%05d","mode":"explore"}`, rng.IntN(benchStates*11/10))
				t0 := time.Now()
				var res struct{ Action string }
				if postErr := postJSON(ctx, client, chooserProc.URL+"/v1/policies/"+names[rng.IntN(benchPolicies)]+"/choose", body, &res); postErr != nil {
					failed.Store(postErr.Error())
					return
				}
				latencies[c] = append(latencies[c], time.Since(t0))
				answered.Add(1)
			}
		})
	}
	wg.Wait()
	choose := time.Since(start)
	if f := failed.Load(); f != nil {
		b.Fatal(f)
	}
	all := slices.Concat(latencies...)
	slices.Sort(all)

	// Sizes on disk, indexes and TOAST included.
	conn, err := pgx.Connect(ctx, srv.URL())
	if err != nil {
		b.Fatal(err)
	}
	defer conn.Close(ctx)
	if _, err = conn.Exec(ctx, "VACUUM ANALYZE"); err != nil {
		b.Fatal(err)
	}
	var episodeBytes, pairBytes, storedEpisodes, pairs float64
	err = conn.QueryRow(ctx, `SELECT pg_total_relation_size('episodes'), pg_total_relation_size('q_values'),
		(SELECT count(*) FROM episodes), (SELECT count(*) FROM q_values)`).Scan(&episodeBytes, &pairBytes, &storedEpisodes, &pairs)
	if err != nil {
		b.Fatal(err)
	}
	rss := residentBytes(b, chooserProc.cmd.Process.Pid) - rssBefore

	report := []struct {
		value float64
		unit  string
	}{
		{episodes / ingest.Seconds(), "ingest_episodes/s"},
		{steps / ingest.Seconds(), "ingest_steps/s"},
		{episodes / train.Seconds(), "train_episodes/s"},
		{steps / train.Seconds(), "train_steps/s"},
		{pairUpdates / train.Seconds(), "train_pair_updates/s"},
		{batchSeconds / batches, "train_batch_mean_s"},
		{float64(answered.Load()) / choose.Seconds(), "choices/s"},
		{float64(all[len(all)/2].Microseconds()) / 1000, "choose_p50_ms"},
		{float64(all[len(all)*99/100].Microseconds()) / 1000, "choose_p99_ms"},
		{episodeBytes / storedEpisodes * 1e6 / (1 << 20), "MiB/M_episodes"},
		{pairBytes / pairs * 1e6 / (1 << 20), "MiB/M_pairs"},
		{pairs, "pairs"},
		{rss / pairs * 1e6 / (1 << 20), "api_table_MiB/M_pairs"},
	}
	for _, r := range report {
		b.ReportMetric(r.value, r.unit)
	}
	b.Logf("%d episodes of %d steps over %d policies; %d posters, %d workers, %d choosers; durable PostgreSQL (fsync on) on loopback",
		int(episodes), benchStepsPerEp, benchPolicies, benchPosters, benchWorkers, benchChoosers)
}

// waitForQuietly is waitFor with a slower poll, so that watching does not
// take CPU from what is measured.
func waitForQuietly(t testing.TB, within time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(within)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out after %v waiting for %s", within, what)
		}
		time.Sleep(500 * time.Millisecond)
	}
}

// residentBytes reads a process's resident set size from /proc.
func residentBytes(t testing.TB, pid int) float64 {
	t.Helper()
	data, err := os.ReadFile(fmt.Sprintf("/proc/%d/status", pid))
	if err != nil {
		t.Fatal(err)
	}
	for _, line := range strings.Split(string(data), "\n") {
		if rest, ok := strings.CutPrefix(line, "VmRSS:"); ok {
			kb, err := strconv.ParseFloat(strings.TrimSuffix(strings.TrimSpace(rest), " kB"), 64)
			if err != nil {
				t.Fatal(err)
			}
			return kb * 1024
		}
	}
	t.Fatalf("no VmRSS in /proc/%d/status", pid)
	return 0
}
