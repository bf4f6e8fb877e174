package systemtest

import (
	"context"
	"fmt"
	"math/rand/v2"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/storage/pgtest"
)

// A worker killed (SIGKILL) in the middle of its batches, again and again,
// while episodes keep arriving, loses nothing and learns nothing twice: once
// a worker drains the backlog, Q and visit counts equal the sequential
// reference over exactly the accepted episodes.
func TestWorkerKilledMidBatch(t *testing.T) {
	t.Parallel()
	const kills = 15
	bin := buildBinary(t)
	databaseURL := pgtest.NewDatabase(t)
	api := startProcess(t, bin, processEnv(databaseURL), "serve", "--no-worker")
	s := api.api()
	ps := policySpec{name: "dunning", gamma: 0.9, alpha: 0.1, visit: "every"}
	ps.create(s)

	ctx, stopClients := context.WithCancel(context.Background())
	defer stopClients()
	l := newLedger(s.authorization)
	var clients sync.WaitGroup
	for c := range 2 {
		clients.Go(func() {
			l.postUntil(ctx, uint64(10+c), "client"+string(rune('a'+c)), 0, []string{api.URL}, []policySpec{ps})
		})
	}

	// Each worker session is tagged, so the test can tell, with the worker
	// frozen (SIGSTOP), whether it holds a policy's training lock, that is,
	// whether it is in the middle of a batch; only then is it killed.
	workerEnv := processEnv(withAppName(t, databaseURL, "doomed-worker"))
	conn, err := pgx.Connect(context.Background(), databaseURL)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(context.Background())
	inBatch := func() bool {
		var n int
		if err := conn.QueryRow(context.Background(), `
			SELECT count(*) FROM pg_locks l JOIN pg_stat_activity a ON a.pid = l.pid
			WHERE l.locktype = 'advisory' AND l.granted AND a.application_name = 'doomed-worker'`).Scan(&n); err != nil {
			t.Fatalf("look for the worker's batch: %v", err)
		}
		return n > 0
	}
	rng := rand.New(rand.NewPCG(7, 8))
	midBatch := 0
	for range kills {
		w := startProcess(t, bin, workerEnv, "worker", "--batch-episodes", "3")
		time.Sleep(time.Duration(20+rng.IntN(200)) * time.Millisecond)
		for try := 0; try < 200; try++ {
			w.signal(syscall.SIGSTOP)
			if inBatch() {
				midBatch++
				break
			}
			w.signal(syscall.SIGCONT)
			time.Sleep(time.Duration(rng.IntN(3000)) * time.Microsecond)
		}
		w.kill()
		// Let a backlog build up before the next worker.
		time.Sleep(time.Duration(rng.IntN(150)) * time.Millisecond)
	}
	stopClients()
	clients.Wait()
	l.check(t)

	killed := time.Now()
	startProcess(t, bin, processEnv(databaseURL), "worker")
	verifyLearnedOnce(t, s, databaseURL, ps, l.episodes(ps.name))
	requests, _, _, accepted := l.counts()
	t.Logf("%d kills (%d with a batch open), %d posts, %d episodes accepted and learned once each; drained and checked in %v",
		kills, midBatch, requests, accepted, time.Since(killed).Round(time.Millisecond))
	if midBatch < kills/2 {
		t.Fatalf("only %d of %d kills caught a batch open", midBatch, kills)
	}
}

// Two API processes and three workers share one database under concurrent
// posting and choosing, on two policies: no request fails, no batch fails
// (a deadlock would show as a failed, retried batch), no episode is learned
// twice, and each policy's Q equals the sequential reference in the order
// the database stored its episodes.
func TestSeveralProcessesShareOneDatabase(t *testing.T) {
	t.Parallel()
	const clientsPerPolicy, batchesPerClient = 3, 40
	bin := buildBinary(t)
	databaseURL := pgtest.NewDatabase(t)
	apis := []*process{
		startProcess(t, bin, processEnv(databaseURL), "serve", "--no-worker"),
		startProcess(t, bin, processEnv(databaseURL), "serve", "--no-worker"),
	}
	var workers []*process
	for range 3 {
		workers = append(workers, startProcess(t, bin, processEnv(databaseURL), "worker", "--batch-episodes", "5"))
	}
	s := apis[0].api()
	policies := []policySpec{
		{name: "renewals", gamma: 0.95, alpha: 0.1, visit: "first"},
		{name: "routing", gamma: 0.8, alpha: 0.25, visit: "every"},
	}
	for _, ps := range policies {
		ps.create(s)
	}
	urls := []string{apis[0].URL, apis[1].URL}

	l := newLedger(s.authorization)
	var clients sync.WaitGroup
	for c := range clientsPerPolicy * len(policies) {
		clients.Go(func() {
			l.postUntil(context.Background(), uint64(100+c), "c"+string(rune('a'+c)), batchesPerClient, urls, policies[c%2:c%2+1])
		})
	}
	// Choosing goes on meanwhile, on both API processes.
	ctx, stopChoosing := context.WithCancel(context.Background())
	var chooser sync.WaitGroup
	chooses := 0
	chooser.Go(func() {
		client := tokenClient(s.authorization, 30*time.Second)
		states := faultStates()
		for i := 0; ctx.Err() == nil; i++ {
			if _, err := choose(client, urls[i%2], policies[i%2].name, states[i%len(states)]); err != nil {
				l.fail("%v", err)
			}
			chooses++
		}
	})
	clients.Wait()
	stopChoosing()
	chooser.Wait()
	l.check(t)

	for _, ps := range policies {
		verifyLearnedOnce(t, s, databaseURL, ps, l.episodes(ps.name))
	}
	// Both processes' in-memory copies catch up with the final tables.
	for _, ps := range policies {
		final := s.status(ps.name).Revision
		for i, a := range apis {
			waitFor(t, patience, fmt.Sprintf("API %d to choose from revision %d of %s", i, final, ps.name), func() bool {
				c, err := choose(a.client(30*time.Second), a.URL, ps.name, "day 0/bucket")
				return err == nil && c.Revision == final
			})
		}
	}
	requests, _, _, accepted := l.counts()
	trained := 0.0
	for i, w := range workers {
		if n := w.metric("qtally_training_errors_total"); n != 0 {
			t.Fatalf("worker %d: %v failed batches\n%s", i, n, w.stderr)
		}
		n := w.metric("qtally_episodes_trained_total")
		t.Logf("worker %d trained %v episodes", i, n)
		trained += n
	}
	if int(trained) != accepted {
		t.Fatalf("workers trained %v episodes, %d were accepted", trained, accepted)
	}
	t.Logf("%d posts, %d choices, %d episodes accepted and learned once each", requests, chooses, accepted)
}

// Two requests for one policy: the first takes its arrival numbers (seq)
// and is held up before committing (its last id collides with a row that
// an open transaction is inserting); the second arrives later. Training
// must still follow arrival order: the second may not commit, and so be
// learned, before the first.
func TestIngestCommitsInArrivalOrder(t *testing.T) {
	t.Parallel()
	databaseURL := pgtest.NewDatabase(t)
	s := startService(t, databaseURL, "serve")
	ps := policySpec{name: "queueing", gamma: 1, alpha: 0.5, visit: "every"}
	ps.create(s)
	step := func(reward float64) []stepJSON {
		return []stepJSON{{State: "day 0/bucket", Action: "wait", Reward: reward}}
	}
	early := []episodeJSON{{ID: "early-1", Steps: step(1)}, {ID: "early-2", Steps: step(2)}}
	late := []episodeJSON{{ID: "late-1", Steps: step(10)}}

	ctx := context.Background()
	conn, err := pgx.Connect(ctx, databaseURL)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	blocker, err := conn.Begin(ctx)
	if err != nil {
		t.Fatal(err)
	}
	defer blocker.Rollback(ctx) //nolint:errcheck // rolled back below; a no-op then
	if _, err = blocker.Exec(ctx, `
		INSERT INTO episodes (policy_id, episode_id, states, actions, rewards)
		SELECT policy_id, 'early-2', '{x}', '{0}', '{0}' FROM policies WHERE name = $1`, ps.name); err != nil {
		t.Fatal(err)
	}
	l := newLedger(s.authorization)
	client := tokenClient(s.authorization, 30*time.Second)
	var posts sync.WaitGroup
	posts.Go(func() { l.post(ctx, client, s.URL, ps.name, early) })
	watch, err := pgx.Connect(ctx, databaseURL)
	if err != nil {
		t.Fatal(err)
	}
	defer watch.Close(ctx)
	waitFor(t, patience, "the first request to wait on the held id", func() bool { return lockWaits(t, watch) == 1 })
	posts.Go(func() { l.post(ctx, client, s.URL, ps.name, late) })
	// Either the second request waits for the first, or it is stored and
	// trained ahead of it.
	waitFor(t, patience, "the second request to wait or be trained", func() bool {
		if lockWaits(t, watch) == 2 {
			return true
		}
		st := s.status(ps.name)
		return st.Episodes == 1 && st.Backlog == 0
	})
	if err := blocker.Rollback(ctx); err != nil {
		t.Fatal(err)
	}
	posts.Wait()
	l.check(t)
	verifyLearnedOnce(t, s, databaseURL, ps, l.episodes(ps.name))
}
