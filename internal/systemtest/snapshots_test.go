package systemtest

import (
	"context"
	"encoding/json"
	"fmt"
	"math"
	"net/http"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/storage/pgtest"
)

type tableRow struct {
	State  string  `json:"state"`
	Action string  `json:"action"`
	Q      float64 `json:"q"`
	Visits int64   `json:"visits"`
}

type tableExport struct {
	Policy   string     `json:"policy"`
	Table    string     `json:"table"`
	Revision int64      `json:"revision"`
	Actions  []string   `json:"actions"`
	Rows     []tableRow `json:"rows"`
}

type tableChange struct {
	Policy   string `json:"policy"`
	Source   string `json:"source"`
	Revision int64  `json:"revision"`
	Pairs    int    `json:"pairs"`
}

func (s *service) export(path string) tableExport {
	var t tableExport
	s.call("GET", path, nil, 200).decode(s.t, &t)
	return t
}

func rowsByPair(rows []tableRow) map[pair]tableRow {
	out := map[pair]tableRow{}
	for _, r := range rows {
		out[pair{r.State, r.Action}] = r
	}
	return out
}

// Freeze a table, learn on, compare, then roll back: the restore waits for
// the training lock, choose serves the restored table at once in the
// process that restored and, on its notification, in another; states learned
// after the snapshot are gone everywhere, and training continues from the
// restored values.
func TestSnapshotDiffAndRestoreRollBack(t *testing.T) {
	t.Parallel()
	db := pgtest.NewDatabase(t)
	s := startService(t, db, "serve")
	other := startService(t, db, "serve", "--no-worker")
	const alpha = 0.5
	// greedy_untried: a state the restore removed is unseen again, and greedy
	// still answers there.
	s.call("PUT", "/v1/policies/routing", map[string]any{"actions": []string{"email", "call", "wait"}, "alpha": alpha, "greedy_untried": true}, 201)
	s.post("routing", oneStep("a1", "late invoice", "call", 6), oneStep("a2", "late invoice", "email", 2), oneStep("a3", "first order", "wait", 2))
	s.waitTrained("routing", 3)
	if c := other.choose("routing", "late invoice"); c.Action != "call" {
		t.Fatalf("before the snapshot: %+v", c)
	}

	var snap struct {
		Name     string `json:"name"`
		Revision int64  `json:"revision"`
		States   int64  `json:"states"`
		Pairs    int64  `json:"pairs"`
	}
	r := s.call("POST", "/v1/policies/routing/snapshots", map[string]any{"name": "before-promo"}, 201)
	r.decode(t, &snap)
	if snap.States != 2 || snap.Pairs != 3 || r.Header.Get("Location") != "/v1/policies/routing/snapshots/before-promo" {
		t.Fatalf("snapshot %+v, location %q", snap, r.Header.Get("Location"))
	}
	frozen := s.export("/v1/policies/routing/snapshots/before-promo/table")
	s.call("POST", "/v1/policies/routing/snapshots", map[string]any{"name": "before-promo"}, 409)
	if p := s.call("POST", "/v1/policies/routing/snapshots", map[string]any{"name": "live"}, 400); !strings.Contains(string(p.Body), "current table") {
		t.Fatalf("reserved name: %s", p.Body)
	}
	s.call("GET", "/v1/policies/routing/snapshots/nope/table", nil, 404)

	// Learn on: email becomes greedy for late invoices, and a new state appears.
	s.post("routing", oneStep("b1", "late invoice", "email", 40), oneStep("b2", "angry reply", "call", 1))
	s.waitTrained("routing", 5)

	var diff struct {
		StatesCompared  int `json:"states_compared"`
		StatesDiffering int `json:"states_differing"`
		Differences     []struct {
			State string `json:"state"`
			From  struct {
				GreedyActions []string `json:"greedy_actions"`
				Values        []struct {
					Action string  `json:"action"`
					Q      float64 `json:"q"`
					Visits int64   `json:"visits"`
				} `json:"values"`
			} `json:"from"`
			To struct {
				GreedyActions []string `json:"greedy_actions"`
			} `json:"to"`
		} `json:"differences"`
	}
	s.call("GET", "/v1/policies/routing/diff?from=before-promo&to=live", nil, 200).decode(t, &diff)
	if diff.StatesCompared != 3 || diff.StatesDiffering != 2 || len(diff.Differences) != 2 {
		t.Fatalf("diff: %+v", diff)
	}
	// States come in order: "angry reply" was unknown (all tied) in the snapshot.
	d0, d1 := diff.Differences[0], diff.Differences[1]
	if d0.State != "angry reply" || !slices.Equal(d0.From.GreedyActions, []string{"email", "call", "wait"}) || !slices.Equal(d0.To.GreedyActions, []string{"call"}) {
		t.Fatalf("first difference %+v", d0)
	}
	if d1.State != "late invoice" || !slices.Equal(d1.From.GreedyActions, []string{"call"}) || !slices.Equal(d1.To.GreedyActions, []string{"email"}) ||
		len(d1.From.Values) != 2 || d1.From.Values[0].Action != "email" || d1.From.Values[0].Q != alpha*2 || d1.From.Values[1].Q != alpha*6 || d1.From.Values[1].Visits != 1 {
		t.Fatalf("second difference %+v", d1)
	}
	s.call("GET", "/v1/policies/routing/diff?limit=1&from=before-promo", nil, 200).decode(t, &diff)
	if diff.StatesDiffering != 2 || len(diff.Differences) != 1 {
		t.Fatalf("limited diff: %+v", diff)
	}
	s.call("GET", "/v1/policies/routing/diff", nil, 400) // live against itself

	// The restore must wait while a training batch holds the policy's lock.
	conn, err := pgx.Connect(context.Background(), db)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(context.Background())
	id := policyID(t, conn, "routing")
	if _, err := conn.Exec(context.Background(), `SELECT pg_advisory_lock($1, $2)`, trainingLockClass, id); err != nil {
		t.Fatal(err)
	}
	restored := make(chan *http.Response, 1)
	go func() {
		resp, err := tokenClient(s.authorization, 30*time.Second).Post(s.URL+"/v1/policies/routing/snapshots/before-promo/restore", "", nil) //nolint:bodyclose // sent on restored, closed after the select below
		if err != nil {
			resp = nil
		}
		restored <- resp
	}()
	select {
	case <-restored:
		t.Fatal("the restore finished while the training lock was held")
	case <-time.After(500 * time.Millisecond):
	}
	if _, err := conn.Exec(context.Background(), `SELECT pg_advisory_unlock($1, $2)`, trainingLockClass, id); err != nil {
		t.Fatal(err)
	}
	var resp *http.Response
	select {
	case resp = <-restored:
	case <-time.After(10 * time.Second):
		t.Fatal("the restore did not finish after the lock was released")
	}
	var change tableChange
	if resp == nil || resp.StatusCode != http.StatusOK || json.NewDecoder(resp.Body).Decode(&change) != nil {
		t.Fatalf("restore answered %v", resp)
	}
	resp.Body.Close()
	if change.Pairs != 3 || change.Source != "before-promo" {
		t.Fatalf("restore: %+v", change)
	}

	// At once in the process that restored; on notification in the other.
	if c := s.choose("routing", "late invoice"); c.Action != "call" || c.Revision != change.Revision {
		t.Fatalf("right after the restore: %+v, want call at revision %d", c, change.Revision)
	}
	if c := s.choose("routing", "angry reply"); c.KnownState {
		t.Fatalf("a state learned after the snapshot is still served: %+v", c)
	}
	waitFor(t, patience, "the other API process to drop the rows the restore removed", func() bool {
		c := other.choose("routing", "angry reply")
		return !c.KnownState && other.choose("routing", "late invoice").Action == "call"
	})
	if st := s.status("routing"); st.Revision != change.Revision || st.Pairs != 3 {
		t.Fatalf("status after restore: %+v", st)
	}
	live := s.export("/v1/policies/routing/table")
	if !slices.Equal(live.Rows, frozen.Rows) {
		t.Fatalf("live rows after restore %+v, snapshot %+v", live.Rows, frozen.Rows)
	}

	// Training goes on from the restored values.
	before := rowsByPair(live.Rows)[pair{"late invoice", "call"}]
	s.post("routing", oneStep("c1", "late invoice", "call", 10))
	s.waitTrained("routing", 6)
	after := rowsByPair(s.export("/v1/policies/routing/table").Rows)[pair{"late invoice", "call"}]
	if want := before.Q + alpha*(10-before.Q); math.Abs(after.Q-want) > 1e-12 || after.Visits != before.Visits+1 {
		t.Fatalf("after restore and one more episode: %+v, want q %v visits %d", after, want, before.Visits+1)
	}

	var list struct {
		Snapshots []struct {
			Name string `json:"name"`
		} `json:"snapshots"`
	}
	s.call("GET", "/v1/policies/routing/snapshots", nil, 200).decode(t, &list)
	if len(list.Snapshots) != 1 || list.Snapshots[0].Name != "before-promo" {
		t.Fatalf("snapshots: %+v", list)
	}
	s.call("DELETE", "/v1/policies/routing/snapshots/before-promo", nil, 204)
	s.call("GET", "/v1/policies/routing/snapshots/before-promo", nil, 404)
	s.call("POST", "/v1/policies/routing/snapshots/before-promo/restore", nil, 404)
}

// An import replaces the table whole and is refused whole when any row is
// wrong, with the row and field of each problem; exports round-trip.
func TestImportAndExportTables(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	// greedy_untried: choose answers in the states the import removes too.
	s.call("PUT", "/v1/policies/shelf", map[string]any{"actions": []string{"front", "back", "none"}, "initial_q": 0.5, "greedy_untried": true}, 201)
	s.post("shelf", oneStep("1", "winter", "back", 3))
	s.waitTrained("shelf", 1)

	bad := "state,action,q,visits\nsummer,front,1.5,3\nsummer,top,2,1\nsummer,front,1,1\n,none,NaN,-1\n"
	r := s.send("PUT", "/v1/policies/shelf/table", "text/csv", []byte(bad), false)
	var p struct {
		Errors []struct {
			Field   string `json:"field"`
			Message string `json:"message"`
		} `json:"errors"`
	}
	r.decode(t, &p)
	var fields []string
	for _, e := range p.Errors {
		fields = append(fields, e.Field)
	}
	want := []string{"rows[1].action", "rows[2].state", "rows[3].state", "rows[3].q", "rows[3].visits"}
	if r.Status != 400 || !slices.Equal(fields, want) {
		t.Fatalf("bad import: %d %s; fields %v, want %v", r.Status, r.Body, fields, want)
	}
	if r := s.send("PUT", "/v1/policies/shelf/table", "text/csv", []byte("state;action\n"), false); r.Status != 400 || !strings.Contains(string(r.Body), "header") {
		t.Fatalf("bad header: %d %s", r.Status, r.Body)
	}
	if r := s.send("PUT", "/v1/policies/shelf/table", "text/csv", []byte("state,action,q,visits\nx,front,high,1\n"), false); r.Status != 400 || !strings.Contains(string(r.Body), "line 2") {
		t.Fatalf("bad number: %d %s", r.Status, r.Body)
	}
	if got := s.export("/v1/policies/shelf/table"); len(got.Rows) != 1 || got.Rows[0].State != "winter" {
		t.Fatalf("a refused import changed the table: %+v", got.Rows)
	}

	good := "state,action,q,visits\nsummer,front,1.25,3\n\"autumn, late\",none,-0.1,7\nsummer,back,1e-3,1\n"
	var change tableChange
	s.send("PUT", "/v1/policies/shelf/table", "text/csv", []byte(good), false).decode(t, &change)
	if change.Pairs != 3 {
		t.Fatalf("import: %+v", change)
	}
	if c := s.choose("shelf", "winter"); c.KnownState {
		t.Fatalf("a state the import left out is still served: %+v", c)
	}
	// summer: front 1.25 beats back 0.001 and none at the initial 0.5.
	if c := s.choose("shelf", "summer"); c.Action != "front" || !c.KnownState {
		t.Fatalf("imported state: %+v", c)
	}
	wantRows := []tableRow{{"autumn, late", "none", -0.1, 7}, {"summer", "front", 1.25, 3}, {"summer", "back", 1e-3, 1}}
	got := s.export("/v1/policies/shelf/table")
	if !slices.Equal(got.Rows, wantRows) || got.Revision != change.Revision {
		t.Fatalf("exported %+v at revision %d, want %+v at %d", got.Rows, got.Revision, wantRows, change.Revision)
	}
	csvOut := s.send("GET", "/v1/policies/shelf/table?format=csv", "", nil, false)
	if want := "state,action,q,visits\n\"autumn, late\",none,-0.1,7\nsummer,front,1.25,3\nsummer,back,0.001,1\n"; string(csvOut.Body) != want ||
		!strings.HasPrefix(csvOut.Header.Get("Content-Type"), "text/csv") {
		t.Fatalf("CSV export %q (%s), want %q", csvOut.Body, csvOut.Header.Get("Content-Type"), want)
	}
	// The JSON export imports back as it is.
	s.call("PUT", "/v1/policies/shelf/table", got, 200)
	if again := s.export("/v1/policies/shelf/table"); !slices.Equal(again.Rows, wantRows) {
		t.Fatalf("after re-import: %+v", again.Rows)
	}
	if r := s.send("PUT", "/v1/policies/shelf/table", "application/json", []byte(`{"policy": "shelf"}`), true); r.Status != 400 || !strings.Contains(string(r.Body), "rows") {
		t.Fatalf("import without rows: %d %s", r.Status, r.Body)
	}
	s.call("PUT", "/v1/policies/nobody/table", map[string]any{"rows": []tableRow{}}, 404)
}

// qtally export and import move a table between policies through the API;
// rows name actions, so the policies may list them in another order.
func TestExportImportCommands(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	s.call("PUT", "/v1/policies/pricing", map[string]any{"actions": []string{"full", "discount"}}, 201)
	s.call("PUT", "/v1/policies/pricing-eu", map[string]any{"actions": []string{"discount", "full"}}, 201)
	for i := range 5 {
		s.post("pricing", oneStep(fmt.Sprint(i), fmt.Sprintf("basket %d", i%3), []string{"full", "discount"}[i%2], float64(i)))
	}
	s.waitTrained("pricing", 5)
	s.call("POST", "/v1/policies/pricing/snapshots", map[string]any{"name": "v1"}, 201)
	dir := t.TempDir()
	for _, name := range []string{"table.csv", "table.json"} {
		file := filepath.Join(dir, name)
		var out strings.Builder
		env := func(k string) string {
			return map[string]string{"QTALLY_URL": s.URL, "QTALLY_TOKEN": strings.TrimPrefix(s.authorization, "Bearer ")}[k]
		}
		if err := run(context.Background(), []string{"qtally", "export", "--policy", "pricing", "--snapshot", "v1", "-o", file}, env, &out, &out); err != nil {
			t.Fatalf("export: %v\n%s", err, out.String())
		}
		data := must(os.ReadFile(file))
		if strings.HasSuffix(name, ".csv") != strings.HasPrefix(string(data), "state,action,q,visits\n") {
			t.Fatalf("%s holds %q", name, data)
		}
		out.Reset()
		if err := run(context.Background(), []string{"qtally", "import", "--url", s.URL, "--policy", "pricing-eu", "-i", file}, env, &out, &out); err != nil {
			t.Fatalf("import: %v\n%s", err, out.String())
		}
		if !strings.Contains(out.String(), "imported 5 pairs into pricing-eu") {
			t.Fatalf("import said %q", out.String())
		}
		src := rowsByPair(s.export("/v1/policies/pricing/table").Rows)
		dst := rowsByPair(s.export("/v1/policies/pricing-eu/table").Rows)
		if len(src) != 5 || fmt.Sprint(src) != fmt.Sprint(dst) {
			t.Fatalf("%s: copied %v, source %v", name, dst, src)
		}
	}
	// A refused import reports the API's reasons and changes nothing.
	bad := filepath.Join(dir, "bad.csv")
	if err := os.WriteFile(bad, []byte("state,action,q,visits\nx,free,1,1\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	var out strings.Builder
	token := "--token=" + strings.TrimPrefix(s.authorization, "Bearer ")
	err := run(context.Background(), []string{"qtally", "import", "--url", s.URL, token, "--policy", "pricing-eu", "--input", bad}, os.Getenv, &out, &out)
	if err == nil || !strings.Contains(err.Error(), "rows[0].action") || !strings.Contains(err.Error(), `"free" is not one of the policy's actions`) {
		t.Fatalf("bad import: %v", err)
	}
	if err := run(context.Background(), []string{"qtally", "export", "--url", s.URL, token, "--policy", "nobody"}, os.Getenv, &out, &out); err == nil || !strings.Contains(err.Error(), "404") {
		t.Fatalf("export of a missing policy: %v", err)
	}
}
