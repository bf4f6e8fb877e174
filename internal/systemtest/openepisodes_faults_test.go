package systemtest

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math/rand/v2"
	"net"
	"net/http"
	"slices"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/storage/pgtest"
)

// keeper is a client that lets qtally keep its episodes: it records each
// decision by choose, adds the reward with a key, and ends the episode,
// retrying every request that was not answered (a dropped connection, a
// 503) with the same episode, step, state and key, until it is. It keeps
// what each decision was answered, to compare with what is stored.
type keeper struct {
	authorization string
	baseURL       func() string
	policy        string

	mu sync.Mutex
	// ended holds every episode the service answered its end for, in the
	// order those answers came (not necessarily the stored order).
	ended map[string]episodeJSON
	// requests, unavailable and dropped count answers; recordedUnanswered
	// counts decisions a retry found recorded after the first attempt's
	// answer was lost.
	requests, unavailable, dropped, recordedUnanswered int
	failures                                           []string
}

func (k *keeper) fail(format string, args ...any) {
	k.mu.Lock()
	defer k.mu.Unlock()
	k.failures = append(k.failures, fmt.Sprintf(format, args...))
}

// send posts body to path until it is answered with something other than
// 503 or a dropped connection, and returns that answer and whether an
// earlier attempt went unanswered.
func (k *keeper) send(client *http.Client, path string, body any) (int, []byte, bool) {
	data := must(json.Marshal(body))
	unanswered := false
	for attempt := 0; attempt < 2000; attempt++ {
		req := must(http.NewRequest(http.MethodPost, k.baseURL()+path, bytes.NewReader(data)))
		req.Header.Set("Content-Type", "application/json")
		resp, err := client.Do(req)
		k.mu.Lock()
		k.requests++
		k.mu.Unlock()
		if err != nil {
			k.mu.Lock()
			k.dropped++
			k.mu.Unlock()
			unanswered = true
			time.Sleep(20 * time.Millisecond)
			continue
		}
		answer, err := io.ReadAll(resp.Body)
		resp.Body.Close()
		if err != nil {
			unanswered = true
			continue
		}
		if resp.StatusCode != http.StatusServiceUnavailable {
			return resp.StatusCode, answer, unanswered
		}
		if resp.Header.Get("Retry-After") == "" {
			k.fail("%s: 503 without Retry-After: %s", path, answer)
		}
		k.mu.Lock()
		k.unavailable++
		k.mu.Unlock()
		unanswered = true
		time.Sleep(50 * time.Millisecond)
	}
	k.fail("%s: never answered", path)
	return 0, nil, unanswered
}

// run keeps episodes until ctx ends, then finishes the one it is in.
func (k *keeper) run(ctx context.Context, seed uint64, name string) {
	rng := rand.New(rand.NewPCG(seed, seed^7))
	client := tokenClient(k.authorization, 10*time.Second)
	base := "/v1/policies/" + k.policy
	for n := 0; ctx.Err() == nil; n++ {
		ep := episodeJSON{ID: fmt.Sprintf("%s-%d", name, n)}
		for step := range 1 + rng.IntN(5) {
			state := faultStates()[rng.IntN(4)]
			body := map[string]any{"state": state, "mode": "explore", "episode": ep.ID, "step": step}
			if rng.IntN(2) == 0 {
				body["allowed"] = faultActions[:2]
			}
			status, data, unanswered := k.send(client, base+"/choose", body)
			var a recordedAnswer
			if status != 200 || json.Unmarshal(data, &a) != nil {
				k.fail("choose %s step %d: %d %s", ep.ID, step, status, data)
				return
			}
			if a.Repeated {
				if !unanswered {
					k.fail("choose %s step %d: repeated on the first attempt", ep.ID, step)
				}
				k.mu.Lock()
				k.recordedUnanswered++
				k.mu.Unlock()
			}
			reward := float64(rng.IntN(9) - 4)
			status, data, _ = k.send(client, base+"/open-episodes/"+ep.ID+"/rewards",
				map[string]any{"reward": reward, "key": fmt.Sprintf("r%d", step)})
			if status != 200 {
				k.fail("reward %s step %d: %d %s", ep.ID, step, status, data)
				return
			}
			p := a.Probability
			ep.Steps = append(ep.Steps, stepJSON{State: state, Action: a.Action, Reward: reward, Probability: &p})
		}
		status, data, _ := k.send(client, base+"/open-episodes/"+ep.ID+"/end", map[string]any{})
		if status != 200 {
			k.fail("end %s: %d %s", ep.ID, status, data)
			return
		}
		k.mu.Lock()
		k.ended[ep.ID] = ep
		k.mu.Unlock()
	}
}

func (k *keeper) check(t testing.TB) {
	t.Helper()
	k.mu.Lock()
	defer k.mu.Unlock()
	if len(k.failures) > 0 {
		t.Fatalf("%d client failures, first: %s", len(k.failures), k.failures[0])
	}
}

// verifyKeptOnce checks that the stored episodes are exactly the ended
// ones, each step with the action and probability its choose answered and
// the reward added, and that the learned table equals a sequential replay
// in stored order.
func verifyKeptOnce(t *testing.T, s *service, databaseURL string, ps policySpec, ended map[string]episodeJSON) {
	t.Helper()
	stored := storedEpisodes(t, databaseURL, ps.name)
	if len(stored) != len(ended) {
		t.Fatalf("%d episodes stored, %d ended", len(stored), len(ended))
	}
	order := make([]episodeJSON, len(stored))
	for i, e := range stored {
		ep, ok := ended[e.id]
		if !ok {
			t.Fatalf("stored episode %s was never ended by a client", e.id)
		}
		for j, st := range ep.Steps {
			if e.states[j] != st.State || faultActions[e.actions[j]] != st.Action || e.probabilities[j] != *st.Probability || e.rewards[j] != st.Reward {
				t.Fatalf("%s step %d: stored %s %s p=%v r=%v, answered %+v (p=%v)", e.id, j, e.states[j], faultActions[e.actions[j]],
					e.probabilities[j], e.rewards[j], st, *st.Probability)
			}
		}
		if len(e.states) != len(ep.Steps) {
			t.Fatalf("%s: %d steps stored, %d answered", e.id, len(e.states), len(ep.Steps))
		}
		order[i] = ep
	}
	waitFor(t, time.Minute, ps.name+" to train its backlog", func() bool {
		st := s.status(ps.name)
		return st.Backlog == 0 && st.Episodes == int64(len(order))
	})
	reference := map[pair]estimate{}
	sequentialReference(order, ps.gamma, ps.alpha, ps.visit == "first", reference)
	compareTables(t, s.table(ps.name, faultStates()), reference)
}

// The API process is killed (SIGKILL) again and again while clients keep
// episodes in it; each restart listens on the same address. A decision
// recorded whose answer never reached its client is answered, on the
// client's retry, with the recorded decision (seen once for certain: a
// request whose answer is never read, the process killed once the
// decision is stored). Afterwards the stored episodes are exactly the
// ended ones, each step as answered, and the table equals a sequential
// replay of them.
func TestKilledProcessAnswersRetriesWithRecordedDecisions(t *testing.T) {
	t.Parallel()
	const kills = 6
	bin := buildBinary(t)
	databaseURL := pgtest.NewDatabase(t)
	env := processEnv(databaseURL)
	env["QTALLY_LISTEN"] = freeLoopbackPort(t)
	token := createToken(t, databaseURL, "--label", "keeper", "--scope", "ingest,choose,admin")
	var current atomic.Pointer[process]
	start := func() *process {
		p := startProcess(t, bin, env, "serve", "--batch-episodes", "4")
		p.authorization = "Bearer " + token
		current.Store(p)
		return p
	}
	p := start()
	s := p.api()
	ps := policySpec{name: "arrears", gamma: 0.9, alpha: 0.2, visit: "every"}
	ps.create(s)

	// For certain once: recorded, never answered, killed.
	conn := must(net.Dial("tcp", env["QTALLY_LISTEN"]))
	body := `{"state":"day 1/bucket","mode":"explore","episode":"lost-answer","step":0}`
	fmt.Fprintf(conn, "POST /v1/policies/arrears/choose HTTP/1.1\r\nHost: x\r\nAuthorization: Bearer %s\r\nContent-Type: application/json\r\nContent-Length: %d\r\n\r\n%s", token, len(body), body)
	db := must(pgx.Connect(context.Background(), databaseURL))
	defer db.Close(context.Background())
	waitFor(t, patience, "the decision to be stored", func() bool {
		var n int
		must(0, db.QueryRow(context.Background(), `SELECT count(*) FROM open_episode_steps WHERE episode_id = 'lost-answer'`).Scan(&n))
		return n == 1
	})
	var state, allowed string
	var action int16
	var probability float64
	if err := db.QueryRow(context.Background(), `SELECT state, action, probability, encode(allowed, 'hex') FROM open_episode_steps WHERE episode_id = 'lost-answer'`).Scan(&state, &action, &probability, &allowed); err != nil {
		t.Fatal(err)
	}
	p.kill()
	conn.Close()
	p = start()
	s = p.api()
	retry := s.record("arrears", "lost-answer", 0, "day 1/bucket")
	if !retry.Repeated || retry.Action != faultActions[action] || retry.Probability != probability || !slices.Equal(retry.Allowed, faultActions) || allowed != "07" {
		t.Fatalf("retry after the kill answered %+v; recorded %s p=%v allowed %s", retry, faultActions[action], probability, allowed)
	}
	s.call("POST", "/v1/policies/arrears/open-episodes/lost-answer/end", nil, 200)

	k := &keeper{authorization: "Bearer " + token, policy: ps.name, ended: map[string]episodeJSON{},
		baseURL: func() string { return current.Load().URL }}
	k.ended["lost-answer"] = episodeJSON{ID: "lost-answer", Steps: []stepJSON{{State: state, Action: faultActions[action], Probability: &probability}}}
	ctx, stop := context.WithCancel(context.Background())
	var clients sync.WaitGroup
	for c := range 4 {
		clients.Go(func() { k.run(ctx, uint64(50+c), fmt.Sprintf("keeper%d", c)) })
	}
	rng := rand.New(rand.NewPCG(9, 9))
	for range kills {
		time.Sleep(time.Duration(150+rng.IntN(300)) * time.Millisecond)
		p.kill()
		p = start()
	}
	time.Sleep(300 * time.Millisecond)
	stop()
	clients.Wait()
	k.check(t)
	verifyKeptOnce(t, p.api(), databaseURL, ps, k.ended)
	t.Logf("%d kills; %d requests, %d dropped connections and retried, %d decisions recorded whose answer was lost (answered on retry); %d episodes ended and learned once each",
		kills, k.requests, k.dropped, k.recordedUnanswered+1, len(k.ended))
}

// PostgreSQL stops for a while, then restarts at once, while clients keep
// episodes: recorded chooses (and rewards and ends) answer 503 with
// Retry-After while it is away and resume by themselves, and afterwards
// every decision answered is stored as answered, nothing recorded is lost,
// and the table equals a sequential replay of the ended episodes.
func TestRecordedChoosesThroughDatabaseOutage(t *testing.T) {
	t.Parallel()
	srv := pgtest.NewServer(t)
	databaseURL := srv.URL()
	bin := buildBinary(t)
	p := startProcess(t, bin, processEnv(databaseURL), "serve", "--batch-episodes", "4")
	s := p.api()
	ps := policySpec{name: "collections", gamma: 0.9, alpha: 0.2, visit: "first"}
	ps.create(s)

	k := &keeper{authorization: p.authorization, policy: ps.name, ended: map[string]episodeJSON{},
		baseURL: func() string { return p.URL }}
	ctx, stop := context.WithCancel(context.Background())
	var clients sync.WaitGroup
	for c := range 3 {
		clients.Go(func() { k.run(ctx, uint64(70+c), fmt.Sprintf("keeper%d", c)) })
	}
	counts := func() (requests, unavailable int) {
		k.mu.Lock()
		defer k.mu.Unlock()
		return k.requests, k.unavailable
	}
	waitFor(t, patience, "some episodes to end", func() bool {
		k.mu.Lock()
		defer k.mu.Unlock()
		return len(k.ended) > 5
	})
	if err := srv.Halt(); err != nil {
		t.Fatal(err)
	}
	waitFor(t, patience, "a request to be answered 503", func() bool {
		_, unavailable := counts()
		return unavailable > 0
	})
	time.Sleep(time.Second)
	if err := srv.Resume(context.Background()); err != nil {
		t.Fatal(err)
	}
	requestsBefore, _ := counts()
	waitFor(t, patience, "requests to be answered again", func() bool {
		requests, _ := counts()
		return requests > requestsBefore+20
	})
	if err := srv.Restart(context.Background()); err != nil {
		t.Fatal(err)
	}
	requestsBefore, _ = counts()
	waitFor(t, patience, "requests to be answered after the restart", func() bool {
		requests, _ := counts()
		return requests > requestsBefore+20
	})
	stop()
	clients.Wait()
	k.check(t)
	verifyKeptOnce(t, s, databaseURL, ps, k.ended)
	requests, unavailable := counts()
	t.Logf("a stop and a restart; %d requests, %d answered 503 and retried, %d decisions found recorded on retry; %d episodes ended and learned once each",
		requests, unavailable, k.recordedUnanswered, len(k.ended))
}
