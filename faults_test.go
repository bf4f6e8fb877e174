package main

import (
	"context"
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
	const kills = 15
	bin := buildBinary(t)
	databaseURL := pgtest.NewDatabase(t)
	api := startProcess(t, bin, processEnv(databaseURL), "serve", "--no-worker")
	s := api.api()
	ps := policySpec{name: "dunning", gamma: 0.9, alpha: 0.1, visit: "every"}
	ps.create(s)

	ctx, stopClients := context.WithCancel(context.Background())
	defer stopClients()
	l := newLedger()
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
