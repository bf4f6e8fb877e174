package systemtest

import (
	"context"
	"fmt"
	"io"
	"net/http"
	"slices"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/qtally/qtally/client"
	"github.com/qtally/qtally/storage/pgtest"
)

// cutAnswers loses the answers of the next `lose` requests after the
// service has answered them, as a connection cut after its commit would.
type cutAnswers struct {
	lose atomic.Int64
	base http.RoundTripper
}

func (c *cutAnswers) RoundTrip(req *http.Request) (*http.Response, error) {
	resp, err := c.base.RoundTrip(req)
	if err != nil || c.lose.Add(-1) < 0 {
		return resp, err
	}
	_, _ = io.Copy(io.Discard, resp.Body)
	resp.Body.Close()
	return nil, fmt.Errorf("connection cut after the service answered %d", resp.StatusCode)
}

// An episode qtally keeps open, driven through the client with answers
// lost on the way: a recorded choose and an end are retried and answered
// as repeated, a keyed reward is retried and counts once, an unkeyed one
// is not retried (it was added once, and the client says it lost the
// answer). The ended episode is learned exactly as the same episode posted.
func TestClientKeepsOpenEpisodes(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	token := strings.TrimPrefix(s.authorization, "Bearer ")
	var seen retries
	cut := &cutAnswers{}
	c := newTestClient(t, s, token, func(rt http.RoundTripper) http.RoundTripper { cut.base = rt; return cut },
		client.Options{Retry: client.RetryPolicy{OnRetry: seen.add, BaseDelay: 10 * time.Millisecond}})
	ctx := context.Background()
	actions := []string{"call", "mail", "wait"}
	settings := client.DefaultSettings(actions...)
	settings.Gamma, settings.Alpha, settings.Epsilon, settings.Visit = 0.9, 0.5, 0.5, "first"
	if _, _, err := c.PutPolicy(ctx, "renewals", settings, ""); err != nil {
		t.Fatal(err)
	}
	// lostOnce runs call with the first answer lost and returns how many
	// retries the client made.
	lostOnce := func(call func() error) (int, error) {
		before := len(seen.list())
		cut.lose.Store(1)
		err := call()
		cut.lose.Store(0)
		return len(seen.list()) - before, err
	}

	first, err := c.ChooseRecorded(ctx, "renewals", "cust-1", 0, client.ChooseRequest{State: "day 0", Mode: client.Explore, Allowed: []string{"call", "mail"}})
	if err != nil || first.Repeated || first.Episode != "cust-1" || first.Step != 0 || first.State != "day 0" || !slices.Equal(first.Allowed, []string{"call", "mail"}) {
		t.Fatalf("first decision: %+v, %v", first, err)
	}
	var second client.Choice
	n, err := lostOnce(func() (err error) {
		second, err = c.ChooseRecorded(ctx, "renewals", "cust-1", 1, client.ChooseRequest{State: "day 1", Mode: client.Explore})
		return err
	})
	if err != nil || n != 1 || !second.Repeated || second.Step != 1 {
		t.Fatalf("recorded choose whose answer was lost: %d retries, %+v, %v; want one retry answered as repeated", n, second, err)
	}
	again, err := c.ChooseRecorded(ctx, "renewals", "cust-1", 1, client.ChooseRequest{State: "day 1", Mode: client.Explore})
	if err != nil || !again.Repeated || again.Action != second.Action || again.Probability != second.Probability {
		t.Fatalf("step 1 again: %+v, %v; recorded %+v", again, err, second)
	}
	if _, err = c.ChooseRecorded(ctx, "renewals", "cust-1", 3, client.ChooseRequest{State: "day 3", Mode: client.Explore}); client.ProblemOf(err) != client.ProblemConflict {
		t.Fatalf("step 3 after step 1: %v, want 409 conflict", err)
	}

	// A keyed reward whose answer is lost is retried and counts once.
	var added client.RewardResult
	n, err = lostOnce(func() (err error) {
		added, err = c.AddReward(ctx, "renewals", "cust-1", 2, client.RewardOptions{Key: "payment-1"})
		return err
	})
	if err != nil || n != 1 || !added.Repeated || added.Step != 1 || added.Reward != 2 {
		t.Fatalf("keyed reward whose answer was lost: %d retries, %+v, %v; want one retry answered as repeated, sum 2", n, added, err)
	}
	if added, err = c.AddReward(ctx, "renewals", "cust-1", 2, client.RewardOptions{Key: "payment-1"}); err != nil || !added.Repeated || added.Reward != 2 {
		t.Fatalf("keyed reward sent again: %+v, %v", added, err)
	}
	// An unkeyed reward whose answer is lost is not retried: it was added.
	if n, err = lostOnce(func() error {
		_, addErr := c.AddReward(ctx, "renewals", "cust-1", 0.5, client.RewardOptions{})
		return addErr
	}); err == nil || n != 0 {
		t.Fatalf("unkeyed reward whose answer was lost: %d retries, %v; want the error and no retry", n, err)
	}
	zero := 0
	if added, err = c.AddReward(ctx, "renewals", "cust-1", -1, client.RewardOptions{Step: &zero, Key: "fee-0"}); err != nil || added.Step != 0 || added.Reward != -1 {
		t.Fatalf("reward to step 0: %+v, %v", added, err)
	}

	open, err := c.OpenEpisode(ctx, "renewals", "cust-1")
	if err != nil || open.ID != "cust-1" || len(open.Steps) != 2 || open.Steps[0].Reward != -1 || open.Steps[1].Reward != 2.5 ||
		open.Steps[0].Action != first.Action || open.Steps[1].Probability != second.Probability || open.Steps[0].Mode != client.Explore {
		t.Fatalf("open episode reads %+v, %v", open, err)
	}

	final := 3.0
	var ended client.EndResult
	n, err = lostOnce(func() (err error) {
		ended, err = c.EndEpisode(ctx, "renewals", "cust-1", &final)
		return err
	})
	if err != nil || n != 1 || !ended.AlreadyEnded || ended.Steps != 2 || ended.Return != 4.5 {
		t.Fatalf("end whose answer was lost: %d retries, %+v, %v; want one retry answered already ended, 2 steps returning -1 + 2.5 + 3", n, ended, err)
	}
	if ended, err = c.EndEpisode(ctx, "renewals", "cust-1", nil); err != nil || !ended.AlreadyEnded || ended.Return != 4.5 {
		t.Fatalf("ending again: %+v, %v", ended, err)
	}
	if _, err := c.OpenEpisode(ctx, "renewals", "cust-1"); client.ProblemOf(err) != client.ProblemNotFound {
		t.Fatalf("reading the ended episode: %v, want 404 not-found", err)
	}

	s.waitTrained("renewals", 1)
	reference := map[pair]estimate{}
	sequentialReference([]episodeJSON{{ID: "cust-1", Steps: []stepJSON{
		{State: "day 0", Action: first.Action, Reward: -1}, {State: "day 1", Action: second.Action, Reward: 5.5}}}}, 0.9, 0.5, true, reference)
	compareTables(t, s.table("renewals", []string{"day 0", "day 1"}), reference)
}
