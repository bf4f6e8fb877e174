package main

import (
	"context"
	"io"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/demo"
	"github.com/qtally/qtally/storage/pgtest"
)

// The demo's simulated customers, driven through the real service with a
// fixed budget of episodes, must teach it a greedy policy at least 90% of
// the way from the uniformly random policy's value to the optimum; both
// values are exact (backward induction on the demo's model).
func TestDemoLearnsNearTheOptimum(t *testing.T) {
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
