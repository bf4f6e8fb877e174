package systemtest

import (
	"context"
	"fmt"
	"net/http"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/qtally/qtally/storage/pgtest"
)

// probe watches one process's /readyz and choose answers while PostgreSQL
// comes and goes.
type probe struct {
	authorization string
	mu            sync.Mutex
	readyCodes    map[int]int
	lastReady     int
	chooses       int
	failures      []string
}

func (p *probe) record(f func(p *probe)) {
	p.mu.Lock()
	defer p.mu.Unlock()
	f(p)
}

func (p *probe) ready() int {
	p.mu.Lock()
	defer p.mu.Unlock()
	return p.lastReady
}

// run asks /readyz and choose every few milliseconds until ctx ends.
func (p *probe) run(ctx context.Context, baseURL, policy string) {
	client := tokenClient(p.authorization, 10*time.Second)
	for ctx.Err() == nil {
		resp, err := client.Get(baseURL + "/readyz")
		if err != nil {
			p.record(func(p *probe) { p.failures = append(p.failures, fmt.Sprintf("readyz: %v", err)) })
			return
		}
		resp.Body.Close()
		code, retry := resp.StatusCode, resp.Header.Get("Retry-After")
		_, err = choose(client, baseURL, policy, "day 1/bucket")
		p.record(func(p *probe) {
			p.readyCodes[code]++
			p.lastReady = code
			if code != http.StatusOK && (code != http.StatusServiceUnavailable || retry == "") {
				p.failures = append(p.failures, fmt.Sprintf("readyz answered %d (Retry-After %q)", code, retry))
			}
			p.chooses++
			if err != nil {
				p.failures = append(p.failures, err.Error())
			}
		})
		time.Sleep(20 * time.Millisecond)
	}
}

// PostgreSQL stops for a few seconds, then restarts at once, while clients
// post and choose. Posting answers 503 with Retry-After while the database
// is away and resumes by itself; choosing answers from memory throughout
// and its copy_age_seconds grows; /readyz says 503; the worker retries with
// backoff; and afterwards every accepted episode is stored and trained
// exactly once, in arrival order.
func TestDatabaseOutage(t *testing.T) {
	t.Parallel()
	const outage = 3 * time.Second
	srv := pgtest.NewServer(t)
	databaseURL := srv.URL()
	bin := buildBinary(t)
	// The API's poll is longer than the test, so its copy stays current only
	// through notifications: after the outage the listener must be back.
	apiEnv := processEnv(databaseURL)
	apiEnv["QTALLY_POLL_INTERVAL"] = "10m"
	api := startProcess(t, bin, apiEnv, "serve", "--no-worker")
	worker := startProcess(t, bin, processEnv(databaseURL), "worker", "--batch-episodes", "5")
	s := api.api()
	ps := policySpec{name: "collections", gamma: 0.9, alpha: 0.2, visit: "first"}
	ps.create(s)

	ctx, stop := context.WithCancel(context.Background())
	defer stop()
	l := newLedger(s.authorization)
	var clients sync.WaitGroup
	for c := range 2 {
		clients.Go(func() {
			l.postUntil(ctx, uint64(30+c), fmt.Sprintf("client%d", c), 0, []string{api.URL}, []policySpec{ps})
		})
	}
	waitFor(t, patience, "some episodes to be trained", func() bool { return s.status(ps.name).Revision > 2 })
	pr := &probe{readyCodes: map[int]int{}, authorization: s.authorization}
	clients.Go(func() { pr.run(ctx, api.URL, ps.name) })
	waitFor(t, patience, "choose to answer", func() bool { return pr.ready() == http.StatusOK })

	// A stop of some seconds.
	_, unavailableBefore, _, _ := l.counts()
	var choosesBefore, choosesDuring int
	pr.record(func(p *probe) { choosesBefore = p.chooses })
	if err := srv.Halt(); err != nil {
		t.Fatal(err)
	}
	halted := time.Now()
	waitFor(t, patience, "/readyz to report the outage", func() bool { return pr.ready() == http.StatusServiceUnavailable })
	waitFor(t, patience, "a post to be answered 503", func() bool {
		_, unavailable, _, _ := l.counts()
		return unavailable > unavailableBefore
	})
	time.Sleep(outage - time.Since(halted))
	// The copy was last confirmed before the halt, so it is at least as old
	// as the outage.
	down := time.Since(halted)
	c, err := choose(api.client(30*time.Second), api.URL, ps.name, "day 2/bucket")
	if err != nil {
		t.Fatal(err)
	}
	age := c.CopyAge
	if age < down.Seconds() {
		t.Fatalf("choose says its copy is %.2f s old, %.2f s into the outage", age, down.Seconds())
	}
	pr.record(func(p *probe) { choosesDuring = p.chooses - choosesBefore })
	if err := srv.Resume(context.Background()); err != nil {
		t.Fatal(err)
	}
	resumed := time.Now()
	waitFor(t, time.Minute, "/readyz after the outage", func() bool { return pr.ready() == http.StatusOK })
	_, _, _, acceptedBefore := l.counts()
	waitFor(t, time.Minute, "posting to resume", func() bool {
		_, _, _, accepted := l.counts()
		return accepted > acceptedBefore
	})
	t.Logf("outage of %v: %d choices answered from memory, copy age at its end %.2f s; accepting again %v after the server was back",
		outage, choosesDuring, age, time.Since(resumed).Round(time.Millisecond))

	// A restart at once.
	if err := srv.Restart(context.Background()); err != nil {
		t.Fatal(err)
	}
	_, _, _, acceptedBefore = l.counts()
	waitFor(t, time.Minute, "posting to resume after a restart", func() bool {
		_, _, _, accepted := l.counts()
		return accepted > acceptedBefore
	})
	time.Sleep(500 * time.Millisecond)
	stop()
	clients.Wait()
	l.check(t)
	pr.record(func(p *probe) {
		if len(p.failures) > 0 {
			t.Fatalf("%d probe failures, first: %s", len(p.failures), p.failures[0])
		}
	})

	verifyLearnedOnce(t, s, databaseURL, ps, l.episodes(ps.name))
	final := s.status(ps.name).Revision
	// The final revision committed after the server came back, so the copy
	// holding it was confirmed since then.
	waitFor(t, time.Minute, fmt.Sprintf("choose to see the final revision %d", final), func() bool {
		c, err := choose(api.client(30*time.Second), api.URL, ps.name, "day 1/bucket")
		return err == nil && c.Revision == final && c.CopyAge < time.Since(resumed).Seconds()
	})
	// The worker retried with a doubling backoff.
	failed := worker.metric("qtally_training_errors_total")
	for _, wait := range []string{"100ms", "200ms", "400ms"} {
		if !strings.Contains(worker.stderr.String(), "retry_in="+wait) {
			t.Fatalf("the worker's %v failed batches show no retry after %s:\n%s", failed, wait, worker.stderr)
		}
	}
	requests, unavailable, inDoubt, accepted := l.counts()
	t.Logf("2 outages; %d posts, %d answered 503 and retried, %d episodes stored by an attempt whose answer was lost; %d accepted, learned once each; readyz %v in %d probes; worker: %v failed batches",
		requests, unavailable, inDoubt, accepted, pr.readyCodes, pr.chooses, failed)
}
