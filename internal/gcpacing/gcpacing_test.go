package gcpacing

import (
	"context"
	"runtime"
	"runtime/metrics"
	"testing"
	"time"
)

func TestPercentFor(t *testing.T) {
	const mb = 1 << 20
	for _, c := range []struct {
		live, headroom uint64
		want           int
	}{
		// The next collection comes at live*(1+p/100): 8 MB live and 64 MB
		// of headroom give 72 MB, 800 percent.
		{8 * mb, 64 * mb, 800},
		{16 * mb, 64 * mb, 400},
		// Past the headroom, Go's default: the heap doubles.
		{64 * mb, 64 * mb, 100},
		{1024 * mb, 64 * mb, 100},
		// Below the runtime's 4 MB floor (which scales with the percent),
		// as at 4 MB: the floor then equals the headroom.
		{0, 64 * mb, 1600},
		{1 * mb, 64 * mb, 1600},
		{4 * mb, 64 * mb, 1600},
		{8 * mb, 0, 100},
	} {
		if got := PercentFor(c.live, c.headroom); got != c.want {
			t.Errorf("PercentFor(%d MB, %d MB) = %d, want %d", c.live/mb, c.headroom/mb, got, c.want)
		}
	}
}

// The percent follows the live heap collection by collection: high over a
// small heap, Go's default once the live heap passes the headroom, high
// again when it shrinks; the default comes back when KeepHeadroom ends.
func TestKeepHeadroomFollowsTheLiveHeap(t *testing.T) {
	if Chosen() {
		t.Fatal("the test process's GC percent is not the default; run without GOGC")
	}
	const headroom = 32 << 20
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- KeepHeadroom(ctx, headroom) }()
	waitFor(t, "a raised percent over the test's small heap", func() bool { return percent() > 4*defaultPercent })

	held := make([]byte, 4*headroom)
	for i := range held {
		held[i] = 1 // touched, so that it is live, not just reserved
	}
	waitFor(t, "the default percent over a heap past the headroom", func() bool { runtime.GC(); return percent() == defaultPercent })
	runtime.KeepAlive(held)
	waitFor(t, "a raised percent again once the heap shrank", func() bool { runtime.GC(); return percent() > 4*defaultPercent })

	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	if p := percent(); p != defaultPercent {
		t.Errorf("GC percent %d after KeepHeadroom ended, want the default %d", p, defaultPercent)
	}
}

// percent is the GC percent in force.
func percent() int {
	s := []metrics.Sample{{Name: "/gc/gogc:percent"}}
	metrics.Read(s)
	return int(s[0].Value.Uint64())
}

// waitFor polls cond until it holds; the minute only catches a hang.
func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(time.Minute)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("waited a minute for %s; the GC percent is %d", what, percent())
		}
		time.Sleep(time.Millisecond)
	}
}
