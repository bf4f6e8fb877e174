// Package gcpacing keeps a process with a small heap from collecting
// garbage many times a second. Go starts a collection once the heap has
// grown by GOGC percent (100) of what the last one left live: an API
// process holding a few megabytes while it answers thousands of requests
// a second collects a dozen times a second, each collection taking the
// process's core for a while (its share of CPU, and the tail latency of
// the requests it holds up). Raising the percent while the live heap is
// small gives every collection at least a fixed headroom; once the live
// heap is large, the percent is Go's default again.
package gcpacing

import (
	"context"
	"runtime"
	"runtime/debug"
	"runtime/metrics"
	"sync"
)

// defaultPercent is Go's GOGC default.
const defaultPercent = 100

// minimumHeap is the heap the Go runtime never collects below at the
// default percent; at p percent that floor is minimumHeap*p/100, so the
// percent is figured on a live heap of at least this much, lest the floor
// rise past the headroom.
const minimumHeap = 4 << 20

// PercentFor is the GC percent that starts the next collection headroom
// bytes past a live heap of live bytes, and never sooner than Go's default.
func PercentFor(live, headroom uint64) int {
	p := headroom * defaultPercent / max(live, minimumHeap)
	return int(max(p, defaultPercent))
}

// Chosen says whether the process's GC percent was set by its operator
// (GOGC in the environment, or debug.SetGCPercent): anything but the
// default counts as chosen, and KeepHeadroom leaves it alone.
func Chosen() bool {
	s := []metrics.Sample{{Name: "/gc/gogc:percent"}}
	metrics.Read(s)
	return s[0].Value.Kind() != metrics.KindUint64 || s[0].Value.Uint64() != defaultPercent
}

// KeepHeadroom sets the GC percent to PercentFor the live heap after every
// collection until ctx ends, then puts Go's default back. So a collection
// comes headroom bytes past what the one before left live (or, past the
// headroom, when the heap has doubled), however fast the live heap grows.
func KeepHeadroom(ctx context.Context, headroom uint64) error {
	p := &pacer{headroom: headroom, current: defaultPercent, live: []metrics.Sample{{Name: "/gc/heap/live:bytes"}}}
	p.adjust()
	p.armForNextCollection()
	<-ctx.Done()
	p.mu.Lock()
	defer p.mu.Unlock()
	p.stopped = true
	debug.SetGCPercent(defaultPercent)
	return nil
}

type pacer struct {
	headroom uint64
	mu       sync.Mutex
	stopped  bool
	current  int
	live     []metrics.Sample
}

// adjust sets the percent for the live heap now; false once stopped.
func (p *pacer) adjust() bool {
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.stopped {
		return false
	}
	metrics.Read(p.live)
	if percent := PercentFor(p.live[0].Value.Uint64(), p.headroom); percent != p.current {
		debug.SetGCPercent(percent)
		p.current = percent
	}
	return true
}

// sentinel is garbage as soon as it is made: its finalizer runs after the
// next collection. Its pointer keeps it out of the allocator's tiny
// blocks, which are freed only when all that share one are.
type sentinel struct{ _ *byte }

// armForNextCollection adjusts the percent after the next collection, and
// after every one after that until stopped.
func (p *pacer) armForNextCollection() {
	runtime.SetFinalizer(&sentinel{}, func(*sentinel) {
		if p.adjust() {
			p.armForNextCollection()
		}
	})
}
