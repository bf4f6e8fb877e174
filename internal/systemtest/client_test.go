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
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/getkin/kin-openapi/openapi3filter"
	"github.com/getkin/kin-openapi/routers"

	"github.com/qtally/qtally/client"
	"github.com/qtally/qtally/storage/pgtest"
)

// Tests of the client package against the real service. Every request the
// client makes, and every answer, is checked against api/openapi.json on
// the way (documentedTransport), as the harness checks its own.

// documentedTransport checks each request and answer against the OpenAPI
// document, then passes them on.
type documentedTransport struct {
	t      testing.TB
	router routers.Router
	base   http.RoundTripper
}

func (d documentedTransport) RoundTrip(req *http.Request) (*http.Response, error) {
	var body []byte
	if req.Body != nil {
		var err error
		if body, err = io.ReadAll(req.Body); err != nil {
			return nil, err
		}
		req.Body.Close()
	}
	check := req.Clone(req.Context())
	check.Body = io.NopCloser(bytes.NewReader(body))
	route, params, err := d.router.FindRoute(check)
	if err != nil {
		d.t.Errorf("client sent %s %s, which is not in the OpenAPI document: %v", req.Method, req.URL.Path, err)
		return nil, err
	}
	in := &openapi3filter.RequestValidationInput{Request: check, PathParams: params, Route: route,
		Options: &openapi3filter.Options{MultiError: true, AuthenticationFunc: checkBearer}}
	if validateErr := openapi3filter.ValidateRequest(req.Context(), in); validateErr != nil {
		d.t.Errorf("client's %s %s does not match the OpenAPI document: %v", req.Method, req.URL.Path, validateErr)
	}
	req.Body, req.ContentLength = io.NopCloser(bytes.NewReader(body)), int64(len(body))
	resp, err := d.base.RoundTrip(req)
	if err != nil {
		return nil, err
	}
	data, err := io.ReadAll(resp.Body)
	resp.Body.Close()
	if err != nil {
		return nil, err
	}
	out := &openapi3filter.ResponseValidationInput{RequestValidationInput: in, Status: resp.StatusCode, Header: resp.Header,
		Options: &openapi3filter.Options{IncludeResponseStatus: true, MultiError: true}}
	out.SetBodyBytes(data)
	if err := openapi3filter.ValidateResponse(req.Context(), out); err != nil {
		d.t.Errorf("answer to the client's %s %s (%d %s) does not match the OpenAPI document: %v", req.Method, req.URL.Path, resp.StatusCode, data, err)
	}
	resp.Body = io.NopCloser(bytes.NewReader(data))
	return resp, nil
}

// losingTransport loses the answers of the first `lose` episode posts
// after the service has answered them, as a connection cut between the
// service's commit and the client would.
type losingTransport struct {
	lose atomic.Int64
	base http.RoundTripper
}

func (l *losingTransport) RoundTrip(req *http.Request) (*http.Response, error) {
	resp, err := l.base.RoundTrip(req)
	if err != nil || !strings.HasSuffix(req.URL.Path, "/episodes") || l.lose.Add(-1) < 0 {
		return resp, err
	}
	_, _ = io.Copy(io.Discard, resp.Body)
	resp.Body.Close()
	return nil, fmt.Errorf("connection cut after the service answered %d", resp.StatusCode)
}

// retries records the client's retry events.
type retries struct {
	mu     sync.Mutex
	events []client.RetryEvent
}

func (r *retries) add(ev client.RetryEvent) {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.events = append(r.events, ev)
}

func (r *retries) list() []client.RetryEvent {
	r.mu.Lock()
	defer r.mu.Unlock()
	return append([]client.RetryEvent(nil), r.events...)
}

func (r *retries) withStatus(status int) []client.RetryEvent {
	var out []client.RetryEvent
	for _, ev := range r.list() {
		if ev.Status == status {
			out = append(out, ev)
		}
	}
	return out
}

// newTestClient is a client of s with the given token, checked against the
// document, its transport wrapped by wrap (nil: none).
func newTestClient(t *testing.T, s *service, token string, wrap func(http.RoundTripper) http.RoundTripper, opts client.Options) *client.Client {
	t.Helper()
	var rt http.RoundTripper = documentedTransport{t: t, router: s.router, base: http.DefaultTransport}
	if wrap != nil {
		rt = wrap(rt)
	}
	opts.Token = token
	opts.HTTPClient = &http.Client{Transport: rt, Timeout: 30 * time.Second}
	c, err := client.New(s.URL, opts)
	if err != nil {
		t.Fatal(err)
	}
	return c
}

func toClientEpisodes(eps []episodeJSON) []client.Episode {
	out := make([]client.Episode, len(eps))
	for i, ep := range eps {
		out[i] = client.Episode{ID: ep.ID}
		for _, st := range ep.Steps {
			step := client.Step{State: st.State, Action: st.Action, Reward: st.Reward}
			if st.Probability != nil {
				step.Probability = *st.Probability
			}
			out[i].Steps = append(out[i].Steps, step)
		}
	}
	return out
}

func fromClientEpisodes(eps []client.Episode) []episodeJSON {
	out := make([]episodeJSON, len(eps))
	for i, ep := range eps {
		out[i] = episodeJSON{ID: ep.ID}
		for _, st := range ep.Steps {
			p := st.Probability
			out[i].Steps = append(out[i].Steps, stepJSON{State: st.State, Action: st.Action, Reward: st.Reward, Probability: &p})
		}
	}
	return out
}

func putFaultPolicy(t *testing.T, c *client.Client, ps policySpec) {
	t.Helper()
	settings := client.DefaultSettings(faultActions...)
	settings.Gamma, settings.Alpha, settings.Visit = ps.gamma, ps.alpha, ps.visit
	if _, created, err := c.PutPolicy(context.Background(), ps.name, settings, ""); err != nil || !created {
		t.Fatalf("create %s: created %v, %v", ps.name, created, err)
	}
}

// An answer lost after the service stored a batch, and PostgreSQL stopping
// while batches are posted: the client posts again with the same ids, the
// service counts what it had stored as duplicates, and the table equals a
// sequential replay of the accepted episodes, each learned once. The
// streamed (NDJSON) form is retried from the start the same way.
func TestClientRetriesWithoutCountingTwice(t *testing.T) {
	t.Parallel()
	srv := pgtest.NewServer(t)
	s := startService(t, srv.URL())
	token := strings.TrimPrefix(s.authorization, "Bearer ")
	var seen retries
	losing := &losingTransport{}
	c := newTestClient(t, s, token, func(rt http.RoundTripper) http.RoundTripper { losing.base = rt; return losing },
		client.Options{StreamThreshold: 40, Retry: client.RetryPolicy{OnRetry: seen.add, BaseDelay: 20 * time.Millisecond}})
	ps := policySpec{name: "renewals", gamma: 0.9, alpha: 0.2, visit: "first"}
	putFaultPolicy(t, c, ps)
	ctx := context.Background()
	rng := rand.New(rand.NewPCG(14, 15))
	accepted := map[string]episodeJSON{}
	post := func(eps []episodeJSON) client.IngestResult {
		t.Helper()
		res, err := c.PostEpisodes(ctx, ps.name, toClientEpisodes(eps))
		if err != nil {
			t.Fatalf("post %s...: %v", eps[0].ID, err)
		}
		if res.Accepted+res.Duplicates != len(eps) {
			t.Fatalf("post of %d episodes: %+v", len(eps), res)
		}
		for _, ep := range eps {
			accepted[ep.ID] = ep
		}
		return res
	}

	// Lost answers: a JSON batch, then a streamed one.
	for i, n := range []int{7, 60} {
		losing.lose.Store(1)
		before := len(seen.list())
		res := post(randomBatch(rng, fmt.Sprintf("lost-%d", i), n, faultActions))
		if res.Accepted != 0 || res.Duplicates != n {
			t.Fatalf("batch of %d whose first answer was lost: %+v, want every episode a duplicate", n, res)
		}
		if evs := seen.list()[before:]; len(evs) != 1 || evs[0].Status != 0 {
			t.Fatalf("batch of %d: retries %+v, want one after the lost answer", n, evs)
		}
	}
	if res := post(randomBatch(rng, "fresh", 5, faultActions)); res.Accepted != 5 {
		t.Fatalf("fresh batch: %+v", res)
	}

	// An outage: batches go on being posted while PostgreSQL stops, and a
	// recorder goes on recording. Its client gives up after 2 attempts, so
	// the recorder's own persistence is what carries it through.
	var seenByRecorder retries
	recClient := newTestClient(t, s, token, nil, client.Options{Retry: client.RetryPolicy{MaxAttempts: 2,
		BaseDelay: 20 * time.Millisecond, MaxDelay: 200 * time.Millisecond, OnRetry: seenByRecorder.add}})
	var recorded sync.Map
	rec := recClient.NewRecorder(ps.name, client.RecorderOptions{BatchSize: 4, QueueSize: 8, FlushInterval: 50 * time.Millisecond,
		OnPosted: func(batch []client.Episode, _ client.IngestResult) {
			for _, ep := range fromClientEpisodes(batch) {
				recorded.Store(ep.ID, ep)
			}
		}})
	stop := make(chan struct{})
	ended := make(chan error, 1)
	go func() {
		r := rand.New(rand.NewPCG(18, 19))
		for i := 0; ; i++ {
			select {
			case <-stop:
				ended <- nil
				return
			default:
			}
			ep := randomBatch(r, fmt.Sprintf("recorded-%d", i), 1, faultActions)[0]
			recording := rec.Start(ep.ID)
			for _, st := range ep.Steps {
				recording.Step(client.Choice{State: st.State, Action: st.Action, Probability: *st.Probability})
				recording.Reward(st.Reward)
			}
			if err := recording.End(ctx); err != nil {
				ended <- err
				return
			}
		}
	}()
	done := make(chan struct{})
	var mu sync.Mutex
	var posted [][]episodeJSON
	var postErr error
	go func() {
		defer close(done)
		r := rand.New(rand.NewPCG(16, 17))
		for i := 0; ; i++ {
			select {
			case <-stop:
				return
			default:
			}
			eps := randomBatch(r, fmt.Sprintf("outage-%d", i), 1+r.IntN(8), faultActions)
			res, err := c.PostEpisodes(ctx, ps.name, toClientEpisodes(eps))
			mu.Lock()
			if err == nil && res.Accepted+res.Duplicates != len(eps) {
				err = fmt.Errorf("post of %d episodes: %+v", len(eps), res)
			}
			if err != nil {
				postErr = err
			} else {
				posted = append(posted, eps)
			}
			mu.Unlock()
			if err != nil {
				return
			}
		}
	}()
	waitFor(t, patience, "some posts before the outage", func() bool { mu.Lock(); defer mu.Unlock(); return len(posted) > 3 })
	if err := srv.Halt(); err != nil {
		t.Fatal(err)
	}
	waitFor(t, patience, "the clients to retry after a 503", func() bool {
		return len(seen.withStatus(http.StatusServiceUnavailable)) > 0 && len(seenByRecorder.withStatus(http.StatusServiceUnavailable)) > 2
	})
	if err := srv.Resume(ctx); err != nil {
		t.Fatal(err)
	}
	mu.Lock()
	after := len(posted)
	mu.Unlock()
	waitFor(t, patience, "posts to go through after the outage", func() bool { mu.Lock(); defer mu.Unlock(); return len(posted) > after+3 })
	close(stop)
	<-done
	if postErr != nil {
		t.Fatalf("a post failed through the outage: %v", postErr)
	}
	if err := <-ended; err != nil {
		t.Fatalf("recording through the outage: %v", err)
	}
	if err := rec.Close(ctx); err != nil {
		t.Fatal(err)
	}
	if st := rec.Stats(); st.Dropped != 0 || st.Accepted+st.Duplicates != st.Ended {
		t.Fatalf("recorder through the outage: %+v", st)
	}
	recorded.Range(func(id, ep any) bool {
		accepted[id.(string)] = ep.(episodeJSON)
		return true
	})
	for _, ev := range seen.withStatus(http.StatusServiceUnavailable) {
		// The service asks for 1 s (api/errors.go); the client never waits less.
		if ev.RetryAfter < time.Second || ev.Wait < ev.RetryAfter {
			t.Fatalf("retry after a 503 asked Retry-After %v and waited %v", ev.RetryAfter, ev.Wait)
		}
	}
	for _, eps := range posted {
		for _, ep := range eps {
			accepted[ep.ID] = ep
		}
	}
	verifyLearnedOnce(t, s, srv.URL(), ps, accepted)
	_, families := s.scrape()
	duplicates := sample(families, "qtally_episodes_duplicate_total", map[string]string{"policy": ps.name}).GetCounter().GetValue()
	if duplicates < 67 {
		t.Fatalf("the service counted %v duplicates, want at least the 67 of the lost answers", duplicates)
	}
	t.Logf("%d episodes accepted, each learned once (%d through the recorder); %d retries after a 503, %d by the recorder's client; %v duplicates counted",
		len(accepted), rec.Stats().Ended, len(seen.withStatus(http.StatusServiceUnavailable)), len(seenByRecorder.withStatus(http.StatusServiceUnavailable)), duplicates)
}

// The recorder copies each step from the choice the service made (state,
// action, probability, allowed set), adds rewards up, and posts finished
// episodes in full batches from the background: 95 episodes in batches of
// 10 are 10 posts, the last by Close. What it posted is what the table
// learned, and an evaluation finds every step logged with its probability
// and allowed set. Snapshots, restore and a replay go through the client
// too: a replay with the same settings learns the same table.
func TestRecorderPostsInBatches(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	token := strings.TrimPrefix(s.authorization, "Bearer ")
	c := newTestClient(t, s, token, nil, client.Options{PollInterval: 50 * time.Millisecond})
	ps := policySpec{name: "onboarding-tips", gamma: 0.95, alpha: 0.1, visit: "every"}
	putFaultPolicy(t, c, ps)
	ctx := context.Background()

	var mu sync.Mutex
	var posted []client.Episode
	rec := c.NewRecorder(ps.name, client.RecorderOptions{BatchSize: 10, FlushInterval: time.Hour, QueueSize: 20,
		OnPosted: func(batch []client.Episode, _ client.IngestResult) {
			mu.Lock()
			posted = append(posted, batch...)
			mu.Unlock()
		}})
	rng := rand.New(rand.NewPCG(3, 4))
	states := faultStates()
	var choices []client.Choice
	for i := range 95 {
		ep := rec.Start(fmt.Sprintf("user-%d", i))
		for j := range 1 + rng.IntN(4) {
			req := client.ChooseRequest{State: states[rng.IntN(len(states))], Mode: client.Explore}
			if j%2 == 1 {
				req.Allowed = faultActions[1:]
			}
			ch, err := c.Choose(ctx, ps.name, req)
			if err != nil {
				t.Fatal(err)
			}
			choices = append(choices, ch)
			ep.Step(ch)
			ep.Reward(float64(rng.IntN(5)))
			ep.Reward(-0.25)
		}
		if err := ep.End(ctx); err != nil {
			t.Fatal(err)
		}
	}
	if err := rec.Close(ctx); err != nil {
		t.Fatal(err)
	}
	st := rec.Stats()
	if st.Ended != 95 || st.Posts != 10 || st.Accepted != 95 || st.Duplicates != 0 || st.Dropped != 0 {
		t.Fatalf("recorder stats %+v, want 95 episodes in 10 posts", st)
	}
	_, families := s.scrape()
	route := map[string]string{"route": "/v1/policies/:policy/episodes", "method": "POST", "code": "202"}
	if n := sample(families, "qtally_http_request_duration_seconds", route).GetHistogram().GetSampleCount(); n != 10 {
		t.Fatalf("the service answered %d episode posts, want 10", n)
	}
	k := 0
	for _, ep := range posted {
		for _, step := range ep.Steps {
			ch := choices[k]
			k++
			if step.State != ch.State || step.Action != ch.Action || step.Probability != ch.Probability || fmt.Sprint(step.Allowed) != fmt.Sprint(ch.Allowed) {
				t.Fatalf("episode %s logged %+v for the choice %+v", ep.ID, step, ch)
			}
			if r := step.Reward + 0.25; r != math.Trunc(r) {
				t.Fatalf("episode %s: reward %v is not the sum of its parts", ep.ID, step.Reward)
			}
		}
	}
	accepted := map[string]episodeJSON{}
	for _, ep := range fromClientEpisodes(posted) {
		accepted[ep.ID] = ep
	}
	verifyLearnedOnce(t, s, s.databaseURL, ps, accepted)

	var phases []client.Progress
	res, err := c.Evaluate(ctx, ps.name, client.EvaluationRequest{Resamples: 200}, func(p client.Progress) { phases = append(phases, p) })
	if err != nil {
		t.Fatal(err)
	}
	if res.EpisodesRead != 95 || res.EpisodesWithoutProbabilities != 0 || res.StepsWithoutAllowed != 0 {
		t.Fatalf("evaluation read %d episodes, %d without probabilities, %d steps without an allowed set",
			res.EpisodesRead, res.EpisodesWithoutProbabilities, res.StepsWithoutAllowed)
	}
	if len(phases) == 0 {
		t.Fatal("the evaluation reported no progress")
	}

	// Snapshot, wipe, restore; replay into a new policy with the same
	// settings, which learns the same table from the same episodes.
	snap, err := c.CreateSnapshot(ctx, ps.name, "after-95")
	if err != nil {
		t.Fatal(err)
	}
	if _, err = c.ImportRows(ctx, ps.name, nil, nil); err != nil {
		t.Fatal(err)
	}
	if restored, restoreErr := c.RestoreSnapshot(ctx, ps.name, snap.Name); restoreErr != nil || restored.Pairs != snap.Pairs || restored.Source != snap.Name {
		t.Fatalf("restore %+v: %+v, %v", snap, restored, restoreErr)
	}
	var replayProgress []client.Progress
	replay, err := c.RunReplay(ctx, ps.name, client.ReplayRequest{Target: "onboarding-tips-replayed"},
		func(p client.Progress) { replayProgress = append(replayProgress, p) })
	if err != nil {
		t.Fatal(err)
	}
	if replay.EpisodesReplayed != 95 || len(replayProgress) == 0 {
		t.Fatalf("replay %+v, progress %v", replay, replayProgress)
	}
	live, err := c.Table(ctx, ps.name, client.LiveTable)
	if err != nil {
		t.Fatal(err)
	}
	replayed, err := c.Table(ctx, "onboarding-tips-replayed", "")
	if err != nil {
		t.Fatal(err)
	}
	if fmt.Sprint(live.Rows) != fmt.Sprint(replayed.Rows) {
		t.Fatalf("replayed table differs:\n%v\n%v", live.Rows, replayed.Rows)
	}
	if err := c.DeleteSnapshot(ctx, ps.name, snap.Name); err != nil {
		t.Fatal(err)
	}
	if list, err := c.Snapshots(ctx, ps.name); err != nil || len(list) != 0 {
		t.Fatalf("snapshots after the delete: %v, %v", list, err)
	}

	// A step without a choice, and a reward before any step, are refused
	// at End, before they reach the service.
	bad := c.NewRecorder(ps.name, client.RecorderOptions{})
	ep := bad.Start("made-up")
	ep.Step(client.Choice{Action: "wait", Probability: 1})
	if err := ep.End(ctx); err == nil || !strings.Contains(err.Error(), "no state") {
		t.Fatalf("a step without a state: %v", err)
	}
	ep = bad.Start("early-reward")
	ep.Reward(1)
	if err := ep.End(ctx); err == nil || !strings.Contains(err.Error(), "before the first step") {
		t.Fatalf("a reward before any step: %v", err)
	}
	if err := bad.Close(ctx); err != nil || bad.Stats().Posts != 0 {
		t.Fatalf("closing a recorder with nothing to post: %v, %+v", err, bad.Stats())
	}
}

// A token over its rate gets 429 with Retry-After; the client waits at
// least that long, so each retried call is refused exactly once (a client
// that came back sooner would be refused again). While posts are held up
// this way the recorder keeps at most QueueSize + BatchSize episodes and
// then refuses more, and posts them all once it is let through.
func TestClientHonoursRetryAfterAndBoundsTheRecorder(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	ctx := context.Background()
	admin := newTestClient(t, s, strings.TrimPrefix(s.authorization, "Bearer "), nil, client.Options{})
	ps := policySpec{name: "reminders", gamma: 1, alpha: 0.1, visit: "first"}
	putFaultPolicy(t, admin, ps)
	// One request every 2 s, none saved up.
	slow := createToken(t, s.databaseURL, "--label", "slow", "--scope", "ingest,choose,admin", "--rate", "0.5", "--burst", "1")
	var seen retries
	c := newTestClient(t, s, slow, nil, client.Options{Retry: client.RetryPolicy{OnRetry: seen.add}})

	for range 3 {
		if _, err := c.Choose(ctx, ps.name, client.ChooseRequest{State: "day 1/bucket", Mode: client.Explore}); err != nil {
			t.Fatal(err)
		}
	}
	limited := seen.withStatus(http.StatusTooManyRequests)
	if len(limited) != 2 || len(seen.list()) != 2 {
		t.Fatalf("retries %+v, want one 429 for each of the 2 calls after the first", seen.list())
	}
	for _, ev := range limited {
		if ev.RetryAfter < time.Second || ev.Wait < ev.RetryAfter {
			t.Fatalf("429 asked Retry-After %v; the client waited %v", ev.RetryAfter, ev.Wait)
		}
	}
	_, families := s.scrape()
	route := map[string]string{"route": "/v1/policies/:policy/choose", "method": "POST", "code": "429"}
	if n := sample(families, "qtally_http_request_duration_seconds", route).GetHistogram().GetSampleCount(); n != 2 {
		t.Fatalf("the service refused %d chooses, want 2: the client came back before Retry-After", n)
	}

	const batch, queue = 5, 10
	rec := c.NewRecorder(ps.name, client.RecorderOptions{BatchSize: batch, QueueSize: queue, FlushInterval: time.Hour, NoWait: true})
	kept, refused := 0, 0
	// fill ends episodes until the recorder refuses one.
	fill := func() {
		t.Helper()
		for {
			ep := rec.Start(fmt.Sprintf("held-%d", kept))
			ep.Step(client.Choice{State: "day 2/bucket", Action: "wait", Probability: 1, Allowed: []string{"wait"}})
			ep.Reward(1)
			err := ep.End(ctx)
			if errors.Is(err, client.ErrQueueFull) {
				refused++
				break
			}
			if err != nil {
				t.Fatal(err)
			}
			kept++
			if st := rec.Stats(); st.Queued+st.Posting > queue+batch {
				t.Fatalf("the recorder holds %d queued and %d in its batch; its bound is %d", st.Queued, st.Posting, queue+batch)
			}
		}
		if st := rec.Stats(); st.Queued+st.Posting < queue {
			t.Fatalf("the recorder refused an episode holding %d queued and %d in its batch, under its queue of %d", st.Queued, st.Posting, queue)
		}
	}
	fill()
	// Once the sender holds a batch (its post waiting out a 429), the queue
	// takes more, up to its size again.
	waitFor(t, patience, "the sender to take a batch", func() bool { return rec.Stats().Posting == batch })
	fill()
	if err := rec.Close(ctx); err != nil {
		t.Fatal(err)
	}
	if st := rec.Stats(); st.Accepted != int64(kept) || st.Refused != int64(refused) || st.Dropped != 0 {
		t.Fatalf("recorder stats %+v after keeping %d", st, kept)
	}

	// A table imported from a file is sent again from the file's start
	// after a 429.
	file := filepath.Join(t.TempDir(), "table.json")
	f := must(os.Create(file))
	if err := admin.ExportTable(ctx, ps.name, "", client.JSON, f); err != nil {
		t.Fatal(err)
	}
	f.Close()
	f = must(os.Open(file))
	defer f.Close()
	if _, err := c.Choose(ctx, ps.name, client.ChooseRequest{State: "day 1/bucket", Mode: client.Explore}); err != nil {
		t.Fatal(err)
	}
	before := len(seen.withStatus(http.StatusTooManyRequests))
	change, err := c.ImportTable(ctx, ps.name, client.JSON, f)
	if err != nil {
		t.Fatal(err)
	}
	if change.Pairs != 1 || len(seen.withStatus(http.StatusTooManyRequests)) == before {
		t.Fatalf("import after a 429: %+v, retries %+v", change, seen.list()[before:])
	}
	t.Logf("kept %d episodes (queue %d, batch %d), refused %d; %d retries after 429", kept, queue, batch, refused, len(seen.withStatus(http.StatusTooManyRequests)))
}

// Refusals come back as *client.Error with the problem JSON: its type,
// and each problem's episode, step and field. They are not retried.
func TestClientErrorCarriesTheProblem(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	var seen retries
	c := newTestClient(t, s, strings.TrimPrefix(s.authorization, "Bearer "), nil, client.Options{Retry: client.RetryPolicy{OnRetry: seen.add}})
	ps := policySpec{name: "upgrades", gamma: 1, alpha: 0.1, visit: "first"}
	putFaultPolicy(t, c, ps)
	ctx := context.Background()
	eps := []client.Episode{
		{ID: "fine", Steps: []client.Step{{State: "a", Action: "wait", Reward: 1, Probability: 0.5}}},
		{ID: "bad", Steps: []client.Step{{State: "a", Action: "wait"}, {State: "b", Action: "shout", Reward: 1}}},
	}
	_, err := c.PostEpisodes(ctx, ps.name, eps)
	var apiErr *client.Error
	if !errors.As(err, &apiErr) {
		t.Fatalf("post of an invalid batch: %v", err)
	}
	p := apiErr.Problem
	if apiErr.StatusCode != http.StatusBadRequest || p.Name() != client.ProblemInvalidInput || len(p.Errors) != 1 {
		t.Fatalf("problem %+v", p)
	}
	if f := p.Errors[0]; f.Where() != "episode 1, step 1, action" {
		t.Fatalf("problem at %q: %s", f.Where(), f.Message)
	}
	if !strings.Contains(err.Error(), "episode 1, step 1, action: ") {
		t.Fatalf("error text does not say where: %v", err)
	}
	if _, err := c.Policy(ctx, "nobody"); client.StatusOf(err) != 404 || client.ProblemOf(err) != client.ProblemNotFound {
		t.Fatalf("unknown policy: %v", err)
	}
	if n := len(seen.list()); n != 0 {
		t.Fatalf("%d retries of refusals", n)
	}
	if st, err := c.Policy(ctx, ps.name); err != nil || st.Episodes != 0 {
		t.Fatalf("after the refusal: %+v, %v", st, err)
	}
}

// The Go program in the README runs against a service as it stands, and
// runs again on the policy the first run left: its settings are replaced,
// and the second run's episodes (ids of their own) are stored beside the
// first's.
func TestReadmeGoExampleRuns(t *testing.T) {
	t.Parallel()
	readme := string(must(os.ReadFile("README.md")))
	_, section, ok := strings.Cut(readme, "## From Go")
	_, program, ok2 := strings.Cut(section, "```go\n")
	program, _, ok3 := strings.Cut(program, "```\n")
	if !ok || !ok2 || !ok3 {
		t.Fatal("README has no Go program under \"## From Go\"")
	}
	dir := t.TempDir()
	src, bin := filepath.Join(dir, "main.go"), filepath.Join(dir, "onboarding")
	if err := os.WriteFile(src, []byte(program), 0o644); err != nil {
		t.Fatal(err)
	}
	if out, err := exec.Command("go", "build", "-o", bin, src).CombinedOutput(); err != nil {
		t.Fatalf("go build the README's program: %v\n%s", err, out)
	}
	s := startService(t, pgtest.NewDatabase(t))
	// 200 episodes in batches of 50 take 4 requests, or more when a batch
	// waits longer than the recorder's flush interval to fill (its 150
	// chooses on a busy machine) and goes out partly filled.
	posted := regexp.MustCompile(`posted 200 episodes in (\d+) requests, 0 of them duplicates\n`)
	for i, trained := range []string{"onboarding: 200 episodes trained", "onboarding: 400 episodes trained"} {
		cmd := exec.Command(bin)
		cmd.Env = append(os.Environ(), "QTALLY_URL="+s.URL, "QTALLY_TOKEN="+strings.TrimPrefix(s.authorization, "Bearer "))
		out, err := cmd.CombinedOutput()
		m := posted.FindSubmatch(out)
		if err != nil || m == nil || !strings.Contains(string(out), trained) {
			t.Fatalf("run %d of the README's program: %v\n%s\nwant %q then %q", i+1, err, out, posted, trained)
		}
		if n, _ := strconv.Atoi(string(m[1])); n < 4 {
			t.Fatalf("run %d of the README's program posted 200 episodes in %d requests of at most 50", i+1, n)
		}
	}
}

// Settings through the client: a PUT on an existing policy needs the ETag
// Policy read (a clear *client.Error without it, and with a stale one, and
// neither is retried); PatchPolicy changes only what it names; the new
// settings (return target, greedy rules, state shape, quotas) go and come
// back as sent; greedy's refusal and fallback, the settings history,
// erasing an episode and deleting the policy.
func TestClientSettingsNeedTheCurrentETag(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	var seen retries
	c := newTestClient(t, s, strings.TrimPrefix(s.authorization, "Bearer "), nil, client.Options{Retry: client.RetryPolicy{OnRetry: seen.add}})
	ctx := context.Background()
	const name = "renewals"
	settings := client.DefaultSettings("text_reminder", "wait", "write_off")
	settings.Alpha, settings.Epsilon = 0.2, 0.3
	settings.MaxStates, settings.GreedyMinVisits, settings.RequireProbability = 500, 2, true
	settings.ReturnTarget = &client.ReturnTarget{Value: 12.5, Label: "exact optimum"}
	settings.StateShape = &client.StateShape{Fields: []client.StateField{{Name: "stage", Values: []string{"new", "late"}}}}
	created, isNew, err := c.PutPolicy(ctx, name, settings, "")
	if err != nil || !isNew || created.ETag == "" {
		t.Fatalf("create: created %v, ETag %q, %v", isNew, created.ETag, err)
	}
	st, err := c.Policy(ctx, name)
	if err != nil || st.ETag != created.ETag {
		t.Fatalf("read: ETag %q, create's %q, %v", st.ETag, created.ETag, err)
	}
	if st.MaxStates != 500 || st.GreedyMinVisits != 2 || !st.RequireProbability || st.GreedyUntried ||
		st.ReturnTarget == nil || *st.ReturnTarget != *settings.ReturnTarget ||
		st.StateShape == nil || len(st.StateShape.Fields) != 1 || st.StateShape.Fields[0].Name != "stage" {
		t.Fatalf("settings read back: %+v", st.Settings)
	}

	// Replacing without If-Match, or with a stale one, is refused and
	// changes nothing.
	replace := settings
	replace.Alpha, replace.GreedyFallback = 0.05, "wait"
	_, _, err = c.PutPolicy(ctx, name, replace, "")
	var apiErr *client.Error
	if !errors.As(err, &apiErr) || apiErr.StatusCode != http.StatusPreconditionRequired ||
		client.ProblemOf(err) != client.ProblemPreconditionRequired || !strings.Contains(err.Error(), "If-Match") {
		t.Fatalf("PUT without If-Match on an existing policy: %v", err)
	}
	_, _, err = c.PutPolicy(ctx, name, replace, `"stale"`)
	if client.StatusOf(err) != http.StatusPreconditionFailed || client.ProblemOf(err) != client.ProblemPreconditionFailed {
		t.Fatalf("PUT with a stale If-Match: %v", err)
	}
	if now, readErr := c.Policy(ctx, name); readErr != nil || now.Alpha != 0.2 || now.ETag != created.ETag {
		t.Fatalf("after the refusals: alpha %v, ETag %q, %v", now.Alpha, now.ETag, readErr)
	}

	// Greedy has no answer where nothing was tried, until a fallback is set.
	_, err = c.Choose(ctx, name, client.ChooseRequest{State: "stage=new", Mode: client.Greedy})
	if client.StatusOf(err) != http.StatusConflict || client.ProblemOf(err) != client.ProblemNoGreedyAnswer {
		t.Fatalf("greedy in an untried state: %v", err)
	}

	// With the ETag Policy read, the PUT replaces every setting.
	replaced, isNew, err := c.PutPolicy(ctx, name, replace, st.ETag)
	if err != nil || isNew || replaced.ETag == "" || replaced.ETag == st.ETag || replaced.Alpha != 0.05 || replaced.GreedyFallback != "wait" {
		t.Fatalf("PUT with the current ETag: created %v, %+v, %v", isNew, replaced, err)
	}
	// The API's copy takes the new settings on notification.
	var ch client.Choice
	waitFor(t, patience, "the fallback to reach choose", func() bool {
		ch, err = c.Choose(ctx, name, client.ChooseRequest{State: "stage=new", Mode: client.Greedy})
		return client.ProblemOf(err) != client.ProblemNoGreedyAnswer
	})
	if err != nil || ch.Action != "wait" || !ch.Fallback || ch.Visits != 0 {
		t.Fatalf("greedy with a fallback: %+v, %v", ch, err)
	}

	// A patch changes what it names; a stale If-Match is refused; null
	// gives a setting its default again.
	patched, err := c.PatchPolicy(ctx, name, map[string]any{"epsilon": 0.05}, replaced.ETag)
	if err != nil || patched.Epsilon != 0.05 || patched.Alpha != 0.05 || patched.ETag == replaced.ETag {
		t.Fatalf("patch: %+v, %v", patched, err)
	}
	if _, err = c.PatchPolicy(ctx, name, map[string]any{"epsilon": 0.5}, replaced.ETag); client.ProblemOf(err) != client.ProblemPreconditionFailed {
		t.Fatalf("patch with a stale If-Match: %v", err)
	}
	if p, patchErr := c.PatchPolicy(ctx, name, json.RawMessage(`{"greedy_fallback":null}`), ""); patchErr != nil || p.GreedyFallback != "" || p.Epsilon != 0.05 {
		t.Fatalf("patch to the default: %+v, %v", p, patchErr)
	}
	if n := len(seen.list()); n != 0 {
		t.Fatalf("%d retries of refusals", n)
	}

	h, err := c.SettingsHistory(ctx, name, "", 0)
	var kinds []string
	for _, change := range h.Changes {
		kinds = append(kinds, change.Kind)
	}
	if err != nil || strings.Join(kinds, ",") != "patch,patch,replace,create" {
		t.Fatalf("settings history: %v, %v", kinds, err)
	}

	// An erased episode's id can be posted again; a deleted policy is gone.
	ep := client.Episode{ID: "customer-1", Steps: []client.Step{{State: "stage=late", Action: "wait", Reward: 1, Probability: 0.5}}}
	if res, err := c.PostEpisodes(ctx, name, []client.Episode{ep}); err != nil || res.Accepted != 1 {
		t.Fatalf("post: %+v, %v", res, err)
	}
	if err := c.EraseEpisode(ctx, name, ep.ID); err != nil {
		t.Fatalf("erase: %v", err)
	}
	if res, err := c.PostEpisodes(ctx, name, []client.Episode{ep}); err != nil || res.Accepted != 1 || res.Duplicates != 0 {
		t.Fatalf("post after the erasure: %+v, %v", res, err)
	}
	if err := c.DeletePolicy(ctx, name); err != nil {
		t.Fatalf("delete: %v", err)
	}
	if _, err := c.Policy(ctx, name); client.ProblemOf(err) != client.ProblemNotFound {
		t.Fatalf("policy after the deletion: %v", err)
	}
}
