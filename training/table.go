package training

import (
	"context"
	"fmt"
	"log/slog"
	"math"
	"sort"
	"time"
	"unicode/utf8"
)

// LiveTable names a policy's current Q table wherever a table is named;
// every other name is a snapshot's, so no snapshot may be called this.
const LiveTable = "live"

// ValidateSnapshotName accepts names that are safe in a URL path segment
// and are not the name of the live table.
func ValidateSnapshotName(name string) error {
	if !isPolicyName(name) {
		return Invalid(-1, -1, "name", "snapshot names are 1 to %d characters of letters, digits, '.', '_' and '-', starting with a letter or digit", MaxPolicyNameLen)
	}
	if name == LiveTable {
		return Invalid(-1, -1, "name", "%q names the current table and cannot name a snapshot", LiveTable)
	}
	return nil
}

// ValidateTableName accepts LiveTable or a snapshot name.
func ValidateTableName(field, name string) error {
	if name == LiveTable {
		return nil
	}
	if err := ValidateSnapshotName(name); err != nil {
		return Invalid(-1, -1, field, "must be %q or a snapshot name", LiveTable)
	}
	return nil
}

// Snapshot describes a frozen copy of a policy's Q table.
type Snapshot struct {
	Name      string    `json:"name"`
	CreatedAt time.Time `json:"created_at"`
	// Revision is the policy's revision when the table was frozen.
	Revision int64    `json:"revision"`
	Actions  []string `json:"actions"`
	InitialQ float64  `json:"initial_q"`
	States   int64    `json:"states"`
	Pairs    int64    `json:"pairs"`
	// TrainedThroughSeq is the arrival number (an episode's seq) of the
	// last episode the table had learned from when it was frozen: episodes
	// after it are held out from it.
	TrainedThroughSeq int64 `json:"trained_through_seq"`
}

// TableRow is one learned pair in exchange form: actions by name, so a
// table can move between policies whose actions are listed in another order.
type TableRow struct {
	State  string  `json:"state"`
	Action string  `json:"action"`
	Q      float64 `json:"q"`
	Visits int64   `json:"visits"`
}

// TableExport is a whole table as exported: what it belongs to and its rows.
type TableExport struct {
	Policy string `json:"policy"`
	// Table is LiveTable or the snapshot's name.
	Table    string     `json:"table"`
	Revision int64      `json:"revision"`
	Actions  []string   `json:"actions"`
	InitialQ float64    `json:"initial_q"`
	Rows     []TableRow `json:"rows"`
}

// TableChange reports a table replaced by a restore or an import.
type TableChange struct {
	PolicyID int32  `json:"-"`
	Policy   string `json:"policy"`
	// Source is the snapshot restored, or "import".
	Source   string `json:"source"`
	Revision int64  `json:"revision"`
	Pairs    int    `json:"pairs"`
	// InitialQ is the value of the pairs the new table lacks, now the
	// policy's: the snapshot's own, the imported document's, or (when an
	// import names none) the policy's unchanged.
	InitialQ float64 `json:"initial_q"`
}

// CheckInitialQ accepts a table's initial value (nil: none given) within
// the bounds a policy's initial_q setting has.
func CheckInitialQ(initialQ *float64) error {
	if x := initialQ; x != nil && !(math.Abs(*x) <= MaxAbsReward) {
		return Invalid(-1, -1, "initial_q", "must be a finite number of magnitude at most %g", MaxAbsReward)
	}
	return nil
}

// EncodeTable validates rows to be imported into a policy and returns them
// as pairs, naming the row and field of every problem it finds.
func EncodeTable(p Policy, rows []TableRow, maxStateLength int) ([]PairResult, error) {
	var l problemList
	index := p.ActionIndex()
	seen := make(map[PairKey]int, len(rows))
	out := make([]PairResult, 0, len(rows))
	for i, r := range rows {
		field := func(name string) string { return fmt.Sprintf("rows[%d].%s", i, name) }
		switch {
		case r.State == "":
			l.add(-1, -1, field("state"), "is missing")
		case len(r.State) > maxStateLength:
			l.add(-1, -1, field("state"), "is %d bytes, longer than the limit of %d", len(r.State), maxStateLength)
		case !utf8.ValidString(r.State):
			l.add(-1, -1, field("state"), "is not valid UTF-8")
		}
		a, ok := index[r.Action]
		if !ok {
			l.add(-1, -1, field("action"), "%q is not one of the policy's actions", Truncate(r.Action, 64))
		}
		if math.IsNaN(r.Q) || math.IsInf(r.Q, 0) {
			l.add(-1, -1, field("q"), "must be a finite number")
		}
		if r.Visits < 0 {
			l.add(-1, -1, field("visits"), "must not be negative, got %d", r.Visits)
		}
		if !ok || r.State == "" {
			continue
		}
		k := PairKey{State: r.State, Action: a}
		if first, dup := seen[k]; dup {
			l.add(-1, -1, field("state"), "repeats the pair (%q, %q) of rows[%d]", Truncate(r.State, 64), r.Action, first)
			continue
		}
		seen[k] = i
		out = append(out, PairResult{PairKey: k, Estimate: Estimate{Q: r.Q, Visits: r.Visits}})
	}
	if err := l.err(); err != nil {
		return nil, err
	}
	return out, nil
}

// QTable is a Q table in memory, for evaluating and comparing policies.
// States it lacks, and actions a state lacks, hold InitialQ.
type QTable struct {
	Actions  []string
	InitialQ float64
	States   map[string]*TableState
	// Revision is the policy's revision the table was read at, or frozen at
	// for a snapshot; TrainedThroughSeq the seq of the last episode trained
	// into it (training follows seq order).
	Revision          int64
	TrainedThroughSeq int64
}

// TableState is one state's values, by action index.
type TableState struct {
	Q      []float64
	Visits []int64
	// Total is the state's visits over all actions.
	Total int64
}

// NewQTable returns an empty table over actions.
func NewQTable(actions []string, initialQ float64) *QTable {
	return &QTable{Actions: actions, InitialQ: initialQ, States: map[string]*TableState{}}
}

// Set stores one pair.
func (t *QTable) Set(state string, action int16, q float64, visits int64) {
	s, ok := t.States[state]
	if !ok {
		s = &TableState{Q: make([]float64, len(t.Actions)), Visits: make([]int64, len(t.Actions))}
		for i := range s.Q {
			s.Q[i] = t.InitialQ
		}
		t.States[state] = s
	}
	s.Total += visits - s.Visits[action]
	s.Q[action], s.Visits[action] = q, visits
}

// state returns a state's values, the initial ones for a state it lacks.
func (t *QTable) state(name string) *TableState {
	if s, ok := t.States[name]; ok {
		return s
	}
	s := &TableState{Q: make([]float64, len(t.Actions)), Visits: make([]int64, len(t.Actions))}
	for i := range s.Q {
		s.Q[i] = t.InitialQ
	}
	return s
}

// greedySet lists the actions of highest value, in action order.
func greedySet(q []float64) []int {
	top := maxOf(q)
	var set []int
	for i, v := range q {
		if v == top {
			set = append(set, i)
		}
	}
	return set
}

// DiffSide is what one table holds for a state that differs.
type DiffSide struct {
	// GreedyActions are all actions tied at the top.
	GreedyActions []string `json:"greedy_actions"`
	// Values are the Q values and visits of every action greedy on either side.
	Values []DiffValue `json:"values"`
}

// DiffValue is one action's estimate on one side of a difference.
type DiffValue struct {
	Action string  `json:"action"`
	Q      float64 `json:"q"`
	Visits int64   `json:"visits"`
}

// StateDiff is a state whose greedy actions differ between two tables.
type StateDiff struct {
	State string   `json:"state"`
	From  DiffSide `json:"from"`
	To    DiffSide `json:"to"`
}

// TableDiff compares the greedy policies of two tables.
type TableDiff struct {
	From string `json:"from"`
	To   string `json:"to"`
	// StatesCompared counts the states either table holds.
	StatesCompared int `json:"states_compared"`
	// StatesDiffering counts every differing state; Differences lists the
	// first ones in state order, up to the limit asked for.
	StatesDiffering int         `json:"states_differing"`
	Differences     []StateDiff `json:"differences"`
}

// DiffTables lists, in state order, the states whose sets of greedy actions
// differ between two tables over the same actions, up to limit of them.
func DiffTables(from, to *QTable, limit int) TableDiff {
	names := make([]string, 0, len(from.States)+len(to.States))
	for s := range from.States {
		names = append(names, s)
	}
	for s := range to.States {
		if _, ok := from.States[s]; !ok {
			names = append(names, s)
		}
	}
	sort.Strings(names)
	d := TableDiff{StatesCompared: len(names), Differences: []StateDiff{}}
	for _, name := range names {
		a, b := from.state(name), to.state(name)
		ga, gb := greedySet(a.Q), greedySet(b.Q)
		if equalInts(ga, gb) {
			continue
		}
		d.StatesDiffering++
		if len(d.Differences) >= limit {
			continue
		}
		shown := union(ga, gb)
		d.Differences = append(d.Differences, StateDiff{State: name, From: diffSide(from, a, ga, shown), To: diffSide(to, b, gb, shown)})
	}
	return d
}

func diffSide(t *QTable, s *TableState, greedy, shown []int) DiffSide {
	side := DiffSide{GreedyActions: make([]string, len(greedy)), Values: make([]DiffValue, len(shown))}
	for i, a := range greedy {
		side.GreedyActions[i] = t.Actions[a]
	}
	for i, a := range shown {
		side.Values[i] = DiffValue{Action: t.Actions[a], Q: s.Q[a], Visits: s.Visits[a]}
	}
	return side
}

func equalInts(a, b []int) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
}

// union merges two sorted sets.
func union(a, b []int) []int {
	out := make([]int, 0, len(a)+len(b))
	i, j := 0, 0
	for i < len(a) || j < len(b) {
		switch {
		case j == len(b) || (i < len(a) && a[i] < b[j]):
			out = append(out, a[i])
			i++
		case i == len(a) || b[j] < a[i]:
			out = append(out, b[j])
			j++
		default:
			out = append(out, a[i])
			i, j = i+1, j+1
		}
	}
	return out
}

// TableStore replaces policies' Q tables; storage implements it. Both
// methods serialise with training batches of the policy, bump its revision
// and its table epoch, and commit all or nothing.
type TableStore interface {
	RestoreSnapshot(ctx context.Context, policy, snapshot string) (TableChange, error)
	// ImportTable's initialQ, when not nil, is the rows' initial value.
	ImportTable(ctx context.Context, policy string, rows []TableRow, initialQ *float64) (TableChange, error)
}

// Tables replaces Q tables and brings this process's in-memory copy up to
// date before answering, so a choice made here right after a restore is
// made from the restored table (other processes follow on notification).
type Tables struct {
	Store   TableStore
	Replica *Replica
	Logger  *slog.Logger
}

// RestoreSnapshot makes a snapshot the policy's live table.
func (t Tables) RestoreSnapshot(ctx context.Context, policy, snapshot string) (TableChange, error) {
	ch, err := t.Store.RestoreSnapshot(ctx, policy, snapshot)
	if err == nil {
		t.refresh(ctx, ch)
	}
	return ch, err
}

// ImportTable makes the given rows, with their initial value when given,
// the policy's live table.
func (t Tables) ImportTable(ctx context.Context, policy string, rows []TableRow, initialQ *float64) (TableChange, error) {
	ch, err := t.Store.ImportTable(ctx, policy, rows, initialQ)
	if err == nil {
		t.refresh(ctx, ch)
	}
	return ch, err
}

// refresh reloads the local copy. The change is committed whatever happens
// here; if the reload fails, the notification or the poll catches up.
func (t Tables) refresh(ctx context.Context, ch TableChange) {
	if err := t.Replica.Refresh(ctx, ch.PolicyID); err != nil {
		t.Logger.Warn("reloading the in-memory table after a rewrite", "policy", ch.Policy, "error", err)
	}
}
