package storage

import (
	"sync"
	"time"

	"github.com/qtally/qtally/training"
)

// DefaultWarmPairs is how many pairs a worker keeps warm by default, over
// all policies (some 65 bytes each).
const DefaultWarmPairs = 2_000_000

// warmTables keeps, per policy this process trained, the estimates of the
// states its batches touched, as its last batch left them. The next batch
// of the policy then reads only the states it has not seen from
// PostgreSQL. A table is used only while the policy's row still shows
// what that batch wrote (revision, table epoch, settings time): a batch of
// another worker, a replay, a restore, an import or a settings change all
// move one of them, and the table is dropped and built again from reads.
//
// A table is checked out for the length of a batch (which holds the
// policy's training lock) and returned only after its commit, so a batch
// that fails or whose commit is in doubt leaves nothing behind.
type warmTables struct {
	mu       sync.Mutex
	maxPairs int
	pairs    int
	clock    uint64
	tables   map[int32]*warmTable
}

// warmVersion is what a policy's row says about its table.
type warmVersion struct {
	revision  int64
	epoch     int64
	updatedAt time.Time
}

func versionOf(p training.Policy) warmVersion {
	return warmVersion{revision: p.Revision, epoch: p.TableEpoch, updatedAt: p.UpdatedAt}
}

type warmTable struct {
	version warmVersion
	// states holds every stored pair of each state it lists, by action
	// index; a state it does not list is unknown, not empty.
	states   map[string][]warmEstimate
	pairs    int
	lastUsed uint64
}

type warmEstimate struct {
	training.Estimate
	stored bool
}

func newWarmTables(maxPairs int) *warmTables {
	return &warmTables{maxPairs: maxPairs, tables: map[int32]*warmTable{}}
}

// take checks out the policy's table if it is still current, else returns
// an empty one.
func (w *warmTables) take(policyID int32, current warmVersion) *warmTable {
	w.mu.Lock()
	defer w.mu.Unlock()
	t, ok := w.tables[policyID]
	if ok {
		delete(w.tables, policyID)
		w.pairs -= t.pairs
	}
	if !ok || t.version != current {
		return &warmTable{states: map[string][]warmEstimate{}}
	}
	return t
}

// put returns a table after its batch committed, at version, and drops the
// least recently trained tables while the total is over the limit.
func (w *warmTables) put(policyID int32, t *warmTable, version warmVersion) {
	w.mu.Lock()
	defer w.mu.Unlock()
	if t.pairs > w.maxPairs {
		return
	}
	w.clock++
	t.version, t.lastUsed = version, w.clock
	w.tables[policyID] = t
	w.pairs += t.pairs
	for w.pairs > w.maxPairs {
		oldest := policyID
		for id, o := range w.tables {
			if o.lastUsed < w.tables[oldest].lastUsed {
				oldest = id
			}
		}
		w.pairs -= w.tables[oldest].pairs
		delete(w.tables, oldest)
	}
}

// unknown lists the states the table does not hold.
func (t *warmTable) unknown(states []string) []string {
	var out []string
	for _, s := range states {
		if _, ok := t.states[s]; !ok {
			out = append(out, s)
		}
	}
	return out
}

// learn records the stored estimates read for states (all of each state's
// pairs: a state with none is recorded as empty).
func (t *warmTable) learn(states []string, read map[training.PairKey]training.Estimate, actions int) {
	for _, s := range states {
		t.states[s] = make([]warmEstimate, actions)
	}
	for k, e := range read {
		t.set(k, e)
	}
}

func (t *warmTable) set(k training.PairKey, e training.Estimate) {
	row := t.states[k.State]
	if !row[k.Action].stored {
		t.pairs++
	}
	row[k.Action] = warmEstimate{Estimate: e, stored: true}
}

// current gives the stored estimates of states, all of which it holds.
func (t *warmTable) current(states []string) map[training.PairKey]training.Estimate {
	out := make(map[training.PairKey]training.Estimate, len(states))
	for _, s := range states {
		for a, e := range t.states[s] {
			if e.stored {
				out[training.PairKey{State: s, Action: int16(a)}] = e.Estimate
			}
		}
	}
	return out
}

// apply records what a batch wrote.
func (t *warmTable) apply(pairs []training.PairResult) {
	for _, p := range pairs {
		t.set(p.PairKey, p.Estimate)
	}
}

// SetWarmPairs sets how many pairs the worker keeps warm over all policies
// (0: none; every batch reads its estimates). Call it before training.
func (db *DB) SetWarmPairs(n int) {
	db.warm = newWarmTables(n)
}
