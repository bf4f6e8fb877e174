package systemtest

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"os"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/internal/load"
	"github.com/qtally/qtally/storage/pgtest"
)

// runLoad runs `qtally load args...` and decodes its JSON output into v.
func runLoad(t *testing.T, v any, args ...string) {
	t.Helper()
	var out, errOut bytes.Buffer
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	if err := run(ctx, append([]string{"qtally", "load"}, args...), func(string) string { return "" }, &out, &errOut); err != nil {
		t.Fatalf("qtally load %s: %v\n%s", strings.Join(args, " "), err, errOut.String())
	}
	if err := json.Unmarshal(out.Bytes(), v); err != nil {
		t.Fatalf("qtally load %s printed %q: %v", args[0], out.String(), err)
	}
}

// The load scenarios drive a real service and count exactly what they
// sent: every posted episode is stored once, every choose answered.
func TestLoadScenariosAgainstService(t *testing.T) {
	t.Parallel()
	databaseURL := pgtest.NewDatabase(t)
	pprofAddr := freeLoopbackAddr(t)
	// No per-token rate limit, as make bench runs it: on a quiet machine
	// four clients choose faster than the default allows, and the answers
	// would be 429s instead of the scenario's.
	s := startService(t, databaseURL, "serve", "--pprof-listen", pprofAddr, "--token-rate", "0")
	common := []string{"--url", s.URL, "--token", strings.TrimPrefix(s.authorization, "Bearer "), "--json", "--policy", "loadtest", "--states", "200"}

	var post load.Figures
	runLoad(t, &post, append([]string{"post", "--duration", "1s", "--workers", "4", "--episodes-per-post", "10"}, common...)...)
	if post.Requests == 0 || post.Success != 1 || post.StatusCodes["202"] != int(post.Requests) {
		t.Fatalf("post: %+v", post)
	}
	var wait load.WaitReport
	runLoad(t, &wait, append([]string{"wait", "--duration", "1m"}, common...)...)
	var st struct {
		Episodes int64 `json:"episodes"`
		Backlog  int64 `json:"backlog"`
	}
	s.call(http.MethodGet, "/v1/policies/loadtest", nil, http.StatusOK).decode(t, &st)
	if st.Episodes != int64(post.Requests)*10 || st.Backlog != 0 {
		t.Fatalf("after %d posts of 10 episodes the policy holds %d episodes, %d untrained", post.Requests, st.Episodes, st.Backlog)
	}

	var choose load.Figures
	runLoad(t, &choose, append([]string{"choose", "--duration", "1s", "--workers", "4"}, common...)...)
	if choose.Requests == 0 || choose.Success != 1 {
		t.Fatalf("choose: %+v", choose)
	}

	// Given the PostgreSQL server's process id, recorded choose also
	// reports that server's processor time a request; every recorded
	// decision costs PostgreSQL a write, so it is never 0.
	var recorded load.Figures
	runLoad(t, &recorded, append([]string{"recorded-choose", "--duration", "1s", "--workers", "4",
		"--postgres-pid", strconv.Itoa(postgresServerPID(t, databaseURL))}, common...)...)
	if recorded.Requests == 0 || recorded.Success != 1 {
		t.Fatalf("recorded choose: %+v", recorded)
	}
	if recorded.ClientCPU <= 0 || recorded.ServiceCPU <= 0 || recorded.PostgresCPU <= 0 {
		t.Fatalf("recorded choose: processor time a request: load generator %g, service %g, PostgreSQL %g us",
			recorded.ClientCPU, recorded.ServiceCPU, recorded.PostgresCPU)
	}
	var kept load.MixedReport
	runLoad(t, &kept, append([]string{"mixed", "--keep-episodes", "--duration", "2s", "--rate", "20", "--steps", "5", "--workers", "4",
		"--database-url", databaseURL}, common...)...)
	// Five recorded chooses per ended episode; a client's episode under way
	// at the end stays open.
	if kept.Episodes == 0 || kept.Chooses < kept.Episodes*5 || kept.Chooses > (kept.Episodes+4)*5 || kept.Errors != 0 {
		t.Fatalf("mixed, kept: %d episodes of 5 steps ended, %d chooses (want 5 each), %d errors", kept.Episodes, kept.Chooses, kept.Errors)
	}

	var mixed load.MixedReport
	runLoad(t, &mixed, append([]string{"mixed", "--duration", "3s", "--rate", "100", "--choose-every", "5", "--workers", "8",
		"--episodes-per-post", "20", "--database-url", databaseURL, "--pprof-url", "http://" + pprofAddr}, common...)...)
	// Four chooses per episode; a client's episode under way at the end is
	// not posted.
	if mixed.Episodes == 0 || mixed.Chooses < mixed.Episodes*4 || mixed.Chooses > (mixed.Episodes+8)*4 || mixed.Errors != 0 {
		t.Fatalf("mixed: %d episodes of 20 steps posted, %d chooses (want 4 each), %d errors", mixed.Episodes, mixed.Chooses, mixed.Errors)
	}
	if len(mixed.Visibility) == 0 || len(mixed.Backlog) == 0 || mixed.MemoryStart == nil || mixed.MemoryEnd == nil {
		t.Fatalf("mixed saw %d commits, %d backlog samples, memory %v and %v",
			len(mixed.Visibility), len(mixed.Backlog), mixed.MemoryStart, mixed.MemoryEnd)
	}

	var sustain load.SustainReport
	runLoad(t, &sustain, append([]string{"sustain", "--duration", "3s", "--trials", "2", "--rate", "20", "--workers", "8",
		"--episodes-per-post", "20", "--database-url", databaseURL}, common...)...)
	if len(sustain.Trials) != 2 || sustain.ChoosesPerEpisode != 20 || sustain.StepsPerEpisode != 20 {
		t.Fatalf("sustain: %+v", sustain)
	}
	// The second rate follows from the first: doubled when it kept up,
	// halved when not.
	first, second := sustain.Trials[0], sustain.Trials[1]
	if want := map[bool]float64{true: 40, false: 10}[first.Flat]; first.OfferedPerSec != 20 || second.OfferedPerSec != want {
		t.Fatalf("sustain tried %v then %v episodes/s (first flat: %v)", first.OfferedPerSec, second.OfferedPerSec, first.Flat)
	}
	for i, tr := range sustain.Trials {
		if tr.ArrivalProbes == 0 || tr.ArrivalP50 <= 0 || tr.ArrivalP99 < tr.ArrivalP50 || tr.Errors != 0 {
			t.Fatalf("sustain run %d: %+v", i, tr)
		}
		if tr.Flat && sustain.Best < i {
			t.Fatalf("sustain: run %d was flat, best is %d", i, sustain.Best)
		}
	}

	// The same loop with the episodes kept by qtally: a recorded choose
	// and a reward each step, and the end, counted as requests an episode.
	var sustainKept load.SustainReport
	runLoad(t, &sustainKept, append([]string{"sustain", "--keep-episodes", "--duration", "2s", "--trials", "1", "--rate", "10", "--steps", "5",
		"--workers", "8", "--database-url", databaseURL}, common...)...)
	if len(sustainKept.Trials) != 1 || !sustainKept.KeepEpisodes || sustainKept.RequestsPerEpisode != 11 {
		t.Fatalf("sustain, kept: %+v", sustainKept)
	}
	if tr := sustainKept.Trials[0]; tr.EpisodesPerSec == 0 || tr.ArrivalProbes == 0 || tr.Errors != 0 {
		t.Fatalf("sustain, kept: %+v", tr)
	}

	// Go's http.Client, kept for comparison, sends the same requests.
	for _, keep := range []bool{false, true} {
		var viaGo load.MixedReport
		args := []string{"mixed", "--go-client", "--duration", "1s", "--rate", "20", "--steps", "5", "--workers", "4", "--database-url", databaseURL}
		if keep {
			args = append(args, "--keep-episodes")
		}
		runLoad(t, &viaGo, append(args, common...)...)
		if viaGo.Chooses == 0 || viaGo.Errors != 0 {
			t.Fatalf("mixed with Go's client (kept %v): %d chooses, %d errors", keep, viaGo.Chooses, viaGo.Errors)
		}
	}

	var mem load.MemoryReport
	runLoad(t, &mem, append([]string{"memory", "--pairs", "4000", "--pprof-url", "http://" + pprofAddr}, common...)...)
	if mem.Pairs != 4000 || mem.Before.HeapBytes == 0 || mem.After.RSSBytes == 0 {
		t.Fatalf("memory: %+v", mem)
	}
}

// A drain stores its backlog while no worker runs, then starts a worker
// process of the same binary and times it.
func TestLoadDrainStartsAWorker(t *testing.T) {
	t.Parallel()
	bin := buildBinary(t)
	databaseURL := pgtest.NewDatabase(t)
	api := startProcess(t, bin, map[string]string{"DATABASE_URL": databaseURL, "QTALLY_LISTEN": "127.0.0.1:0"}, "serve", "--no-worker")
	out, err := runBinary(bin, "load", "drain", "--url", api.URL, "--token", strings.TrimPrefix(api.authorization, "Bearer "),
		"--json", "--database-url", databaseURL,
		"--episodes", "300", "--states", "50")
	if err != nil {
		t.Fatalf("drain: %v\n%s", err, out)
	}
	var d load.DrainReport
	if err := json.Unmarshal(out, &d); err != nil {
		t.Fatalf("drain printed %q: %v", out, err)
	}
	// 50 states x 4 actions over 6,000 steps: every pair is seen.
	if d.Episodes != 300 || d.Steps != 300*20 || d.Pairs != 200 || d.StepsPerSec <= 0 {
		t.Fatalf("drain: %+v", d)
	}
}

// postgresServerPID is the process id of the PostgreSQL server behind
// databaseURL (on this machine): the parent of a backend.
func postgresServerPID(t *testing.T, databaseURL string) int {
	t.Helper()
	var backend int
	if err := connectDB(t, databaseURL).QueryRow(context.Background(), `SELECT pg_backend_pid()`).Scan(&backend); err != nil {
		t.Fatal(err)
	}
	stat, err := os.ReadFile(fmt.Sprintf("/proc/%d/stat", backend))
	if err != nil {
		t.Fatal(err)
	}
	// proc(5): "pid (comm) state ppid ...", comm possibly holding ")".
	fields := strings.Fields(string(stat[bytes.LastIndexByte(stat, ')')+1:]))
	pid, err := strconv.Atoi(fields[1])
	if err != nil {
		t.Fatalf("parent of backend %d in %q: %v", backend, stat, err)
	}
	return pid
}
