package systemtest

import (
	"context"
	"io"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/internal/demo"
	"github.com/qtally/qtally/storage/pgtest"
)

// The demo's simulated customers, driven through the real service with a
// fixed budget of episodes, must teach it a greedy policy at least 90% of
// the way from the uniformly random policy's value to the optimum; both
// values are exact (backward induction on the demo's model).
func TestDemoLearnsNearTheOptimum(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t), "serve", "--batch-episodes", "500")
	cfg := demo.DefaultConfig()
	cfg.BaseURL, cfg.Rate, cfg.Episodes = s.URL, 0, 30_000
	cfg.Token = strings.TrimPrefix(s.authorization, "Bearer ")
	cfg.SettleTimeout = 2 * time.Minute
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
	defer cancel()
	report, err := demo.Run(ctx, cfg, io.Discard)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("\n%s", report)
	if report.Untrained != 0 {
		t.Fatalf("%d episodes were still untrained when Q was read", report.Untrained)
	}
	if f := report.Fraction(); f < 0.9 {
		t.Fatalf("learned greedy policy is %.1f%% of the way from random (%.3f) to optimal (%.3f): %.3f",
			100*f, report.Random, report.Optimal, report.Learned)
	}
}

// In the mode where qtally keeps the episodes, the demo posts nothing: each
// customer's decisions are recorded by choose, rewards added as they
// happen and the episode ended when the case closes; every episode is then
// stored once, with each step's probability and allowed set, and trained.
func TestDemoKeepsEpisodesInQtally(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t), "serve", "--batch-episodes", "200")
	cfg := demo.DefaultConfig()
	cfg.BaseURL, cfg.Rate, cfg.Episodes, cfg.KeepEpisodes = s.URL, 0, 400, true
	cfg.Token = strings.TrimPrefix(s.authorization, "Bearer ")
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	report, err := demo.Run(ctx, cfg, io.Discard)
	if err != nil {
		t.Fatal(err)
	}
	if report.Episodes != 400 || report.Untrained != 0 {
		t.Fatalf("report: %d episodes, %d untrained; want 400 and 0", report.Episodes, report.Untrained)
	}
	stored := storedEpisodes(t, s.databaseURL, cfg.Policy)
	if len(stored) != 400 {
		t.Fatalf("%d episodes stored, want 400", len(stored))
	}
	for _, e := range stored {
		if len(e.probabilities) != len(e.states) || len(e.allowed) != len(e.states) || slices.Contains(e.probabilities, 0) {
			t.Fatalf("episode %s stored without a probability or allowed set for every step: %+v", e.id, e)
		}
	}
	if st := s.status(cfg.Policy); st.Episodes != 400 || st.Backlog != 0 {
		t.Fatalf("status: %+v", st)
	}
	m := string(s.call("GET", "/metrics", nil, 200).Body)
	if !strings.Contains(m, `qtally_open_episodes_closed_total{how="ended",policy="payment-recovery-demo"} 400`) {
		t.Fatalf("metrics do not count 400 ended episodes:\n%s", grepLines(m, "qtally_open"))
	}
}
