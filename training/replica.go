package training

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"sync/atomic"
	"time"
)

// QRow is one stored pair as the replica reads it.
type QRow struct {
	State    string
	Action   int16
	Q        float64
	Visits   int64
	Revision int64
}

// ReplicaSource is where the replica reads policies and Q rows from.
type ReplicaSource interface {
	PolicyByName(ctx context.Context, name string) (Policy, error)
	PolicyByID(ctx context.Context, id int32) (Policy, error)
	ListPolicies(ctx context.Context) ([]Policy, error)
	// QRowsSince calls fn for every pair of the policy last written by a
	// revision greater than after.
	QRowsSince(ctx context.Context, policyID int32, after int64, fn func(QRow)) error
}

// Replica is a process's in-memory copy of every policy's Q table, kept
// current by Refresh calls (driven by change notifications and a slow
// poll), so that choosing never waits on the database.
type Replica struct {
	source ReplicaSource

	mu     sync.RWMutex
	byName map[string]*replicaTable
	byID   map[int32]*replicaTable

	flush choiceFlush
}

type replicaTable struct {
	// loadMu serialises loads of this table so rows arrive in order.
	loadMu sync.Mutex

	mu     sync.RWMutex
	policy Policy
	index  map[string]int16
	// fallback is the index of the policy's greedy fallback action, -1 for none.
	fallback int16
	states   map[string]*stateValues
	revision int64
	pairs    int
	visits   int64
	// pairsByVisits counts pairs by their visit count, kept as rows arrive,
	// so that a scrape reads the visit distribution in time proportional to
	// the number of distinct counts, not the number of pairs.
	pairsByVisits map[int64]int64
	// epoch is the policy's table epoch the copy holds.
	epoch int64
	// tally counts the choices made from the copy until the next flush;
	// retiredTallies hold counts made before the actions changed.
	tally          *choiceTally
	retiredTallies []*choiceTally

	syncedAt atomic.Int64 // unix nanoseconds of the last successful check
}

type stateValues struct {
	q      []float64
	visits []int64
	total  int64
}

// NewReplica returns an empty replica; tables load on first use.
func NewReplica(source ReplicaSource) *Replica {
	return &Replica{source: source, byName: map[string]*replicaTable{}, byID: map[int32]*replicaTable{}}
}

// ChooseRequest asks for an action in a state.
type ChooseRequest struct {
	State   string
	Mode    Mode
	Allowed []string
}

// ChooseResult is the chosen action and what it was chosen from.
type ChooseResult struct {
	Action       string
	Probability  float64
	Explored     bool
	GreedyAction string
	KnownState   bool
	// Allowed is the set the action was chosen from: the request's, or
	// every action when it gave none. A step posted with it (and the
	// probability) lets evaluation recompute this choice.
	Allowed []string
	// Visits is how often the chosen action was tried in the state.
	Visits int64
	// Fallback is true when the action is the policy's greedy_fallback,
	// standing in for actions not tried enough.
	Fallback bool
	Revision int64
	// Staleness is how long ago the copy was last confirmed current.
	Staleness time.Duration
}

// maxStackActions bounds the allowed-action count served from a stack
// buffer; larger sets allocate.
const maxStackActions = 64

// Choose picks an action for a state from the in-memory copy.
func (r *Replica) Choose(ctx context.Context, policy string, req ChooseRequest) (ChooseResult, error) {
	res, _, err := r.choose(ctx, policy, req, false)
	return res, err
}

// chosenIn is what recording a choice needs beyond its answer: the policy,
// the indexes of the chosen and greedy actions and the allowed set.
type chosenIn struct {
	tally    *choiceTally
	policyID int32
	actions  []string
	action   int16
	greedy   int16
	allowed  ActionSet
}

// choose picks an action; with record it also says what recording needs
// (which allocates the allowed set, so the plain path does not ask).
func (r *Replica) choose(ctx context.Context, policy string, req ChooseRequest, record bool) (ChooseResult, chosenIn, error) {
	var in chosenIn
	t, err := r.table(ctx, policy)
	if err != nil {
		return ChooseResult{}, in, err
	}
	var qBuf [maxStackActions]float64
	var visitsBuf [maxStackActions]int64
	var idxBuf [maxStackActions]int16
	t.mu.RLock()
	defer t.mu.RUnlock()
	if err := t.policy.CheckState(req.State); err != nil {
		return ChooseResult{}, in, err
	}
	allowed, allowedNames := idxBuf[:0], req.Allowed
	if len(req.Allowed) == 0 {
		// The policy's list is replaced, never changed in place, so the
		// answer may share it.
		allowedNames = t.policy.Actions
		for i := range t.policy.Actions {
			allowed = append(allowed, int16(i))
		}
	} else {
		for i, name := range req.Allowed {
			a, ok := t.index[name]
			if !ok {
				return ChooseResult{}, in, Invalid(-1, -1, fmt.Sprintf("allowed[%d]", i), "%q is not one of the policy's actions", Truncate(name, 64))
			}
			for _, prev := range allowed {
				if prev == a {
					return ChooseResult{}, in, Invalid(-1, -1, fmt.Sprintf("allowed[%d]", i), "repeats %q", Truncate(name, 64))
				}
			}
			allowed = append(allowed, a)
		}
	}
	q, visits := qBuf[:0], visitsBuf[:0]
	sv, known := t.states[req.State]
	var total int64
	fallback := -1
	for i, a := range allowed {
		if known {
			q, visits = append(q, sv.q[a]), append(visits, sv.visits[a])
		} else {
			q, visits = append(q, t.policy.InitialQ), append(visits, 0)
		}
		if a == t.fallback {
			fallback = i
		}
	}
	if known {
		total = sv.total
	}
	c := ChooseWith(q, visits, t.policy.GreedyRule(), fallback, req.Mode, t.policy.EpsilonFor(total), SharedRandom)
	if c.NoAnswer {
		return ChooseResult{}, in, noAnswer(t.policy, req.State)
	}
	if !record {
		// A recorded choice is counted once recorded: a repeated one is not new.
		t.tally.add(allowed[c.Action], req.Mode, c.Explored, known)
	} else {
		in = chosenIn{tally: t.tally, policyID: t.policy.ID, actions: t.policy.Actions, action: allowed[c.Action], greedy: allowed[c.Greedy],
			allowed: make(ActionSet, ActionSetWidth(len(t.policy.Actions)))}
		for _, a := range allowed {
			in.allowed.add(a)
		}
	}
	return ChooseResult{
		Action:       t.policy.Actions[allowed[c.Action]],
		Probability:  c.Probability,
		Explored:     c.Explored,
		GreedyAction: t.policy.Actions[allowed[c.Greedy]],
		KnownState:   known,
		Allowed:      allowedNames,
		Visits:       visits[c.Action],
		Fallback:     c.Fallback,
		Revision:     t.revision,
		Staleness:    time.Since(time.Unix(0, t.syncedAt.Load())),
	}, in, nil
}

// noAnswer explains why greedy has no answer in a state.
func noAnswer(p Policy, state string) error {
	tried := "tried there"
	if p.GreedyMinVisits > 1 {
		tried = fmt.Sprintf("tried there at least %d times (greedy_min_visits)", p.GreedyMinVisits)
	}
	why := "the policy has no greedy_fallback"
	if p.GreedyFallback != "" {
		why = fmt.Sprintf("its greedy_fallback %q is not among the allowed actions", Truncate(p.GreedyFallback, 64))
	}
	return &kindError{ErrNoAnswer, fmt.Sprintf("greedy has no answer in state %q: no allowed action has been %s, and %s; choose with mode explore, set greedy_fallback, or allow the fallback", Truncate(state, 64), tried, why)}
}

// table returns a policy's table, loading it on first use.
func (r *Replica) table(ctx context.Context, name string) (*replicaTable, error) {
	r.mu.RLock()
	t, ok := r.byName[name]
	r.mu.RUnlock()
	if ok {
		return t, nil
	}
	p, err := r.source.PolicyByName(ctx, name)
	if err != nil {
		return nil, err
	}
	return r.load(ctx, p)
}

// load adds (or finds) a policy's table and brings it up to date.
func (r *Replica) load(ctx context.Context, p Policy) (*replicaTable, error) {
	r.mu.Lock()
	t, ok := r.byID[p.ID]
	if !ok {
		// The tally exists from the start: a flush may find the table
		// before its first load has finished, or after it failed.
		t = &replicaTable{policy: p, index: p.ActionIndex(), fallback: -1, states: map[string]*stateValues{}, pairsByVisits: map[int64]int64{},
			tally: newChoiceTally(len(p.Actions))}
		r.byID[p.ID] = t
	}
	r.mu.Unlock()
	if err := r.sync(ctx, t, p); err != nil {
		return nil, err
	}
	r.mu.Lock()
	r.byName[p.Name] = t
	r.mu.Unlock()
	return t, nil
}

// sync applies a policy's settings and the rows changed since the table's
// revision. Rows are read outside the table's lock; choosing goes on.
func (r *Replica) sync(ctx context.Context, t *replicaTable, p Policy) error {
	t.loadMu.Lock()
	defer t.loadMu.Unlock()
	t.mu.RLock()
	after, whole := t.revision, len(t.states) == 0 || p.TableEpoch != t.epoch
	t.mu.RUnlock()
	if whole {
		// A first load, or a table that a restore or import replaced, is
		// built outside the lock straight from the rows, keeping no list of
		// them: a large policy then costs its table and little more, even
		// for a moment. Rows that a replaced table no longer has are gone.
		fresh := &replicaTable{pairsByVisits: map[int64]int64{}}
		fresh.setPolicy(p)
		if err := r.source.QRowsSince(ctx, p.ID, 0, fresh.applyRow); err != nil {
			return fmt.Errorf("refresh policy %q: %w", p.Name, err)
		}
		t.mu.Lock()
		t.policy, t.index, t.fallback, t.states = fresh.policy, fresh.index, fresh.fallback, fresh.states
		t.pairs, t.visits, t.pairsByVisits = fresh.pairs, fresh.visits, fresh.pairsByVisits
		// p was read before the rows, so they hold at least its revision.
		t.epoch, t.revision = p.TableEpoch, max(fresh.revision, p.Revision)
		t.fitTally()
		t.mu.Unlock()
		t.syncedAt.Store(time.Now().UnixNano())
		return nil
	}
	var rows []QRow
	if err := r.source.QRowsSince(ctx, p.ID, after, func(row QRow) { rows = append(rows, row) }); err != nil {
		return fmt.Errorf("refresh policy %q: %w", p.Name, err)
	}
	t.mu.Lock()
	t.setPolicy(p)
	for _, row := range rows {
		t.applyRow(row)
	}
	t.mu.Unlock()
	t.syncedAt.Store(time.Now().UnixNano())
	return nil
}

func (t *replicaTable) setPolicy(p Policy) {
	if t.states == nil || len(p.Actions) != len(t.policy.Actions) {
		// Actions only change while nothing is stored, so there is nothing to keep.
		t.clear()
	}
	t.policy, t.index = p, p.ActionIndex()
	t.fitTally()
	t.fallback = -1
	if a, ok := t.index[p.GreedyFallback]; ok {
		t.fallback = a
	}
}

func (t *replicaTable) applyRow(row QRow) {
	sv, ok := t.states[row.State]
	if !ok {
		n := len(t.policy.Actions)
		sv = &stateValues{q: make([]float64, n), visits: make([]int64, n)}
		for i := range sv.q {
			sv.q[i] = t.policy.InitialQ
		}
		t.states[row.State] = sv
	}
	old := sv.visits[row.Action]
	if old == 0 {
		t.pairs++
	} else if t.pairsByVisits[old]--; t.pairsByVisits[old] == 0 {
		delete(t.pairsByVisits, old)
	}
	t.pairsByVisits[row.Visits]++
	t.visits += row.Visits - old
	sv.total += row.Visits - old
	sv.q[row.Action] = row.Q
	sv.visits[row.Action] = row.Visits
	t.revision = max(t.revision, row.Revision)
}

// fitTally gives the table a tally as wide as its actions, keeping the
// counts of a narrower or wider one for the next flush.
func (t *replicaTable) fitTally() {
	if t.tally != nil && len(t.tally.counts) == len(t.policy.Actions)*choiceKinds {
		return
	}
	if t.tally != nil {
		t.retiredTallies = append(t.retiredTallies, t.tally)
	}
	t.tally = newChoiceTally(len(t.policy.Actions))
}

// clear empties the table and its visit counts.
func (t *replicaTable) clear() {
	t.states = map[string]*stateValues{}
	t.pairs, t.visits = 0, 0
	clear(t.pairsByVisits)
}

// Refresh brings one policy's table up to date, if this process holds it.
func (r *Replica) Refresh(ctx context.Context, policyID int32) error {
	r.mu.RLock()
	t, ok := r.byID[policyID]
	r.mu.RUnlock()
	if !ok {
		return nil
	}
	p, err := r.source.PolicyByID(ctx, policyID)
	if errors.Is(err, ErrNotFound) {
		r.drop(policyID)
		return nil
	}
	if err != nil {
		return err
	}
	return r.renamed(t, p, r.sync(ctx, t, p))
}

// drop forgets a deleted policy's table.
func (r *Replica) drop(policyID int32) {
	r.mu.Lock()
	defer r.mu.Unlock()
	t, ok := r.byID[policyID]
	if !ok {
		return
	}
	delete(r.byID, policyID)
	for name, held := range r.byName {
		if held == t {
			delete(r.byName, name)
		}
	}
}

// renamed keeps the name index right after a sync (names never change
// today, but a stale entry would serve the wrong policy if they did).
func (r *Replica) renamed(t *replicaTable, p Policy, err error) error {
	if err != nil {
		return err
	}
	r.mu.Lock()
	r.byName[p.Name] = t
	r.mu.Unlock()
	return nil
}

// RefreshAll checks every policy this process holds against the database;
// it is the fallback for missed notifications.
func (r *Replica) RefreshAll(ctx context.Context) error {
	policies, err := r.source.ListPolicies(ctx)
	if err != nil {
		return err
	}
	// Tables of policies deleted meanwhile are dropped.
	exists := make(map[int32]bool, len(policies))
	for _, p := range policies {
		exists[p.ID] = true
	}
	r.mu.RLock()
	var gone []int32
	for id := range r.byID {
		if !exists[id] {
			gone = append(gone, id)
		}
	}
	r.mu.RUnlock()
	for _, id := range gone {
		r.drop(id)
	}
	var errs []error
	for _, p := range policies {
		r.mu.RLock()
		t, ok := r.byID[p.ID]
		r.mu.RUnlock()
		if !ok {
			continue
		}
		t.mu.RLock()
		current := t.revision >= p.Revision && t.policy.UpdatedAt.Equal(p.UpdatedAt) && t.epoch == p.TableEpoch
		t.mu.RUnlock()
		if current {
			t.syncedAt.Store(time.Now().UnixNano())
			continue
		}
		errs = append(errs, r.renamed(t, p, r.sync(ctx, t, p)))
	}
	return errors.Join(errs...)
}

// ReplicaStats describes one policy's in-memory table.
type ReplicaStats struct {
	Policy   string
	Actions  int
	Revision int64
	States   int
	// Pairs counts the pairs visited at least once; Visits adds up their
	// visit counts.
	Pairs    int
	Visits   int64
	SyncedAt time.Time
	// PairsAtLeast[i] counts the pairs with at least atLeast[i] visits, for
	// the atLeast given to Stats.
	PairsAtLeast []int64
}

// Stats lists the tables this process holds, with how many pairs have at
// least each of the given visit counts.
func (r *Replica) Stats(atLeast ...int64) []ReplicaStats {
	r.mu.RLock()
	tables := make([]*replicaTable, 0, len(r.byID))
	for _, t := range r.byID {
		tables = append(tables, t)
	}
	r.mu.RUnlock()
	out := make([]ReplicaStats, 0, len(tables))
	for _, t := range tables {
		t.mu.RLock()
		st := ReplicaStats{Policy: t.policy.Name, Actions: len(t.policy.Actions), Revision: t.revision,
			States: len(t.states), Pairs: t.pairs, Visits: t.visits, SyncedAt: time.Unix(0, t.syncedAt.Load()),
			PairsAtLeast: make([]int64, len(atLeast))}
		for visits, pairs := range t.pairsByVisits {
			for i, k := range atLeast {
				if visits >= k {
					st.PairsAtLeast[i] += pairs
				}
			}
		}
		t.mu.RUnlock()
		out = append(out, st)
	}
	return out
}
