package systemtest

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"slices"
	"syscall"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/storage/pgtest"
)

// heldUp holds the two things a stopping process may be in the middle of:
// its worker's batch, waiting for the Q rows the test has locked, and a
// post, waiting on an episode id the test is inserting. Both wait until
// release.
type heldUp struct {
	t            *testing.T
	rows, insert pgx.Tx
}

func holdUp(t *testing.T, ctx context.Context, databaseURL, policy, heldID string) *heldUp {
	t.Helper()
	begin := func() pgx.Tx {
		conn, err := pgx.Connect(ctx, databaseURL)
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { conn.Close(context.Background()) })
		tx, err := conn.Begin(ctx)
		if err != nil {
			t.Fatal(err)
		}
		return tx
	}
	h := &heldUp{t: t, rows: begin(), insert: begin()}
	if _, err := h.rows.Exec(ctx, `SELECT 1 FROM q_values
		WHERE policy_id = (SELECT policy_id FROM policies WHERE name = $1) FOR UPDATE`, policy); err != nil {
		t.Fatal(err)
	}
	if _, err := h.insert.Exec(ctx, `
		INSERT INTO episodes (policy_id, episode_id, states, actions, rewards)
		SELECT policy_id, $2, '{x}', '{0}', '{0}' FROM policies WHERE name = $1`, policy, heldID); err != nil {
		t.Fatal(err)
	}
	return h
}

func (h *heldUp) release() {
	for _, tx := range []pgx.Tx{h.insert, h.rows} {
		if err := tx.Rollback(context.Background()); err != nil {
			h.t.Fatal(err)
		}
	}
}

// postAsync posts a batch in the background and returns its answer: the
// status, or an error when the connection broke.
func postAsync(client *http.Client, baseURL, policy string, eps []episodeJSON) <-chan error {
	done := make(chan error, 1)
	go func() {
		body := must(json.Marshal(map[string]any{"episodes": eps}))
		resp, err := client.Post(baseURL+"/v1/policies/"+policy+"/episodes", "application/json", bytes.NewReader(body))
		if err != nil {
			done <- err
			return
		}
		resp.Body.Close()
		if resp.StatusCode != http.StatusAccepted {
			done <- fmt.Errorf("status %d", resp.StatusCode)
			return
		}
		done <- nil
	}()
	return done
}

// SIGTERM lets in-flight work finish: a post under way is answered 202, the
// worker's batch commits and the process exits cleanly. When the work
// cannot finish (it is held until after the exit), the grace period ends
// it: the process exits while the work is still held, the batch and the
// post roll back, nothing of them is stored, and a client's retry stores
// the post's episodes once.
func TestSIGTERM(t *testing.T) {
	t.Parallel()
	bin := buildBinary(t)
	databaseURL := pgtest.NewDatabase(t)
	ctx := context.Background()
	watch, err := pgx.Connect(ctx, databaseURL)
	if err != nil {
		t.Fatal(err)
	}
	defer watch.Close(ctx)
	ps := policySpec{name: "checkout", gamma: 0.9, alpha: 0.3, visit: "every"}
	accepted := map[string]episodeJSON{}
	episode := func(id string, reward float64) episodeJSON {
		return episodeJSON{ID: id, Steps: []stepJSON{{State: "day 3/bucket", Action: "remind", Reward: reward}, {State: "day 4/bucket", Action: "wait", Reward: 1}}}
	}
	postNow := func(s *service, eps ...episodeJSON) {
		s.call("POST", "/v1/policies/"+ps.name+"/episodes", map[string]any{"episodes": eps}, 202)
		for _, ep := range eps {
			accepted[ep.ID] = ep
		}
	}
	// stopHeldUp starts a process, gets its worker and a post held up, and
	// sends SIGTERM; it returns the process, the post's answer and the
	// episodes of the worker's batch and the post.
	stopHeldUp := func(grace time.Duration, name string) (*process, *heldUp, <-chan error, []episodeJSON, []episodeJSON) {
		p := startProcess(t, bin, processEnv(databaseURL), "serve", "--shutdown-grace", grace.String())
		s := p.api()
		h := holdUp(t, ctx, databaseURL, ps.name, name+"-post-2")
		batch := []episodeJSON{episode(name+"-batch-1", 3), episode(name+"-batch-2", -1)}
		postNow(s, batch...)
		waitFor(t, patience, "the worker to wait for the locked rows", func() bool { return lockWaits(t, watch) == 1 })
		post := []episodeJSON{episode(name+"-post-1", 5), episode(name+"-post-2", 7)}
		answer := postAsync(p.client(30*time.Second), p.URL, ps.name, post)
		waitFor(t, patience, "the post to wait for the held id", func() bool { return lockWaits(t, watch) == 2 })
		p.signal(syscall.SIGTERM)
		return p, h, answer, batch, post
	}
	untrained := func() []string {
		_, ids := storedOrder(t, databaseURL, ps.name)
		return ids
	}

	// Setup: the rows the test will lock.
	first := startProcess(t, bin, processEnv(databaseURL), "serve")
	s := first.api()
	ps.create(s)
	postNow(s, episode("seed", 1))
	s.waitTrained(ps.name, 1)
	first.terminate(15 * time.Second)

	// Work that can finish does.
	const grace = 10 * time.Second
	p, h, answer, batch, post := stopHeldUp(grace, "finishing")
	sent := time.Now()
	select {
	case <-p.exited:
		t.Fatalf("exited with work in flight\n%s", p.stderr)
	case <-time.After(500 * time.Millisecond):
	}
	h.release()
	if err = <-answer; err != nil {
		t.Fatalf("post in flight at SIGTERM: %v\n%s", err, p.stderr)
	}
	for _, ep := range post {
		accepted[ep.ID] = ep
	}
	<-p.exited
	finished := time.Since(sent)
	if p.err != nil {
		t.Fatalf("exit after %v (grace %v): %v\n%s", finished, grace, p.err, p.stderr)
	}
	if pending := untrained(); slices.Contains(pending, batch[0].ID) || slices.Contains(pending, batch[1].ID) {
		t.Fatalf("the worker's batch did not commit: untrained %v", pending)
	}
	t.Logf("SIGTERM with a batch and a post in flight, released after 0.5 s: post accepted, batch committed, exit after %v", finished)

	// Work that cannot finish within the grace period rolls back.
	const shortGrace = 2 * time.Second
	p, h, answer, batch, post = stopHeldUp(shortGrace, "stuck")
	// The work stays held until after the exit, so exiting at all shows the
	// grace period ended it; the timeout only catches a hang.
	stopped := p.terminate(time.Minute)
	err = <-answer
	t.Logf("SIGTERM with work held past the %v grace: exit after %v; the post's answer: %v", shortGrace, stopped, err)
	if err == nil {
		t.Fatalf("a post held past the grace period was answered 202")
	}
	if pending := untrained(); !slices.Contains(pending, batch[0].ID) || !slices.Contains(pending, batch[1].ID) {
		t.Fatalf("the worker's cut-off batch committed: untrained %v", pending)
	}
	h.release()
	ids, _ := storedOrder(t, databaseURL, ps.name)
	if slices.Contains(ids, post[0].ID) {
		t.Fatalf("the cut-off post stored %s", post[0].ID)
	}

	// The client retries the post; a worker drains.
	last := startProcess(t, bin, processEnv(databaseURL), "serve")
	postNow(last.api(), post...)
	verifyLearnedOnce(t, last.api(), databaseURL, ps, accepted)
}
