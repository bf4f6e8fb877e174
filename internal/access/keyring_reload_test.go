package access

import (
	"context"
	"math"
	"strings"
	"sync/atomic"
	"testing"
	"time"
)

type countingTokens struct{ reads atomic.Int64 }

func (c *countingTokens) ActiveTokens(context.Context) ([]Token, error) {
	c.reads.Add(1)
	return nil, nil
}

// Secrets naming token ids nobody created reload the token list within a
// fixed budget, however many arrive: without a token they cannot become
// database load.
func TestUnknownTokenIDsReloadWithinBudget(t *testing.T) {
	source := &countingTokens{}
	k := NewKeyring(source, "pepper-of-this-test-0123456789abcdef")
	start := time.Now()
	for i := range 2000 {
		secret := FormatSecret(int64(i+1), strings.Repeat("a", 43))
		if _, err := k.Verify(context.Background(), secret); err == nil {
			t.Fatal("a made-up token was accepted")
		}
	}
	// The budget is a token bucket of missReloadsPerSecond a second with as
	// many at once, so the reloads it allows follow from the time the loop
	// took, whatever that was.
	budget := int64(missReloadsPerSecond + math.Ceil(missReloadsPerSecond*time.Since(start).Seconds()))
	if got := source.reads.Load(); got > budget {
		t.Fatalf("2000 unknown ids caused %d reloads, more than the budget of %d", got, budget)
	}
}
