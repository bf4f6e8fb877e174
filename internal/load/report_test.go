package load

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

// testdata/run holds the result files of one real `make bench --quick`
// run (on a busy machine: the figures are noise, the shapes are real).
func TestReportTableFromARun(t *testing.T) {
	tableWithRows(t, "testdata/run",
		// 9976.40 req/s against a ceiling of 4658 req/s.
		"| choose, wrk -t1 -c64 | 9976 req/s | `echo_get_lookup_rps` 4658 req/s | 2.14x | >= 0.8x | yes |",
		"| choose p99, wrk | 22.99 ms | `echo_get_p99_ms` 483.00 ms | 0.05x | <= 2x | yes |",
		"| training drain vs one statement per update | 9029 steps/s | `q_naive_upsert_rows_per_s` 230 rows/s | 39.26x | >= 20x | yes |",
		"| in-memory Q copy: live heap added by 250.0k pairs (per 1M) | 51.6 MB (52 bytes/pair) |  |  | <= 200.0 MB | yes |",
	)
}

// A missing result file is reported as not measured; the other rows stay.
func TestReportSaysWhatWasNotMeasured(t *testing.T) {
	dir := t.TempDir()
	for _, f := range []string{FileCeilings, FileDrain} {
		data, err := os.ReadFile(filepath.Join("testdata/run", f))
		if err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(filepath.Join(dir, f), data, 0o600); err != nil {
			t.Fatal(err)
		}
	}
	table, err := Report(dir)
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(table, "training drain (10.0k episodes, 86.5k pairs) | 9029 steps/s") ||
		!strings.Contains(table, "choose (wrk -t1 -c64): not measured (no choose-wrk.txt)") ||
		!strings.Contains(table, "mixed: not measured (no mixed.json)") {
		t.Errorf("unexpected table:\n%s", table)
	}
	if _, err := Report(t.TempDir()); err == nil {
		t.Error("a directory without ceilings gave a table")
	}
}

func TestWrkDurations(t *testing.T) {
	for in, want := range map[string]time.Duration{
		"812.00us": 812 * time.Microsecond, "1.93ms": 1930 * time.Microsecond, "1.02s": 1020 * time.Millisecond, "1.50m": 90 * time.Second,
	} {
		if got, err := parseWrkDuration(in); err != nil || got != want {
			t.Errorf("%s: %v, %v; want %v", in, got, err, want)
		}
	}
	if _, err := parseWrkDuration("12"); err == nil {
		t.Error("a duration without a unit was read")
	}
}

// testdata/sustain holds the sustain.json of a real `qtally load sustain`
// run at --quick size (three 10 s runs, on a busy machine) beside the
// ceilings.json of testdata/run: the rows' shapes and arithmetic are what is
// checked, not the figures.
func TestReportSustainedLoop(t *testing.T) {
	tableWithRows(t, "testdata/sustain",
		// Best run: 79.8 episodes/s posted. Bound: min(4658 req/s / 20
		// chooses, 61,168 steps/s / 20 steps) = 233 episodes/s; 79.8 / 233
		// = 0.34.
		"| sustained loop: highest flat rate (20 chooses and 20 steps an episode; 2 of 3 trials of 10 s flat) | 79.8 episodes/s (1595 chooses/s) | min(`echo_get_lookup_rps` / 20, `episode_copy_steps_per_s` / 20) 233 episodes/s | 0.34x | >= 0.5x | no |",
		"| sustained loop: arrival to served p99 at that rate (50 probes, 0 unserved at the end) | 444.22 ms (p50 42.78 ms, max 444.22 ms) |  |  | <= 1.00 s | yes |",
	)

	// No flat run at all: the row says so and fails.
	dir := t.TempDir()
	for _, f := range []string{FileCeilings, FileSustain} {
		data, readErr := os.ReadFile(filepath.Join("testdata/sustain", f))
		if readErr != nil {
			t.Fatal(readErr)
		}
		if f == FileSustain {
			data = []byte(strings.Replace(string(data), `"best": 1`, `"best": -1`, 1))
		}
		if err := os.WriteFile(filepath.Join(dir, f), data, 0o600); err != nil {
			t.Fatal(err)
		}
	}
	table, err := Report(dir)
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(table, "| no rate kept up | min(`echo_get_lookup_rps` / 20, `episode_copy_steps_per_s` / 20) 233 episodes/s |  | >= 0.5x | no |") ||
		strings.Contains(table, "arrival to served") {
		t.Errorf("a run with no flat rate gave:\n%s", table)
	}
}

// testdata/sustain/sustain-kept.json is a real `qtally load sustain
// --keep-episodes` run at --quick size on a busy machine. Its bound counts
// the requests of a kept episode (a recorded choose and a reward each
// step, and the end), and it is shown beside the posted loop's rate of the
// same directory, without a target.
func TestReportSustainedLoopKeptByQtally(t *testing.T) {
	table, err := Report("testdata/sustain")
	if err != nil {
		t.Fatal(err)
	}
	// Best run: 22.9 episodes/s ended. Bound: min(4658 req/s / 41
	// requests, 61,168 steps/s / 20 steps) = 114 episodes/s; 22.9 / 114 =
	// 0.20; 22.9 / 79.8 (the posted loop's best) = 0.29.
	want := "| sustained loop, kept by qtally: highest flat rate (41 requests and 20 steps an episode; 1 of 3 trials of 10 s flat) | " +
		"22.9 episodes/s (737 recorded chooses/s); 0.29x the posted loop's rate | " +
		"min(`echo_get_lookup_rps` / 41, `episode_copy_steps_per_s` / 20) 114 episodes/s | 0.20x |  |  |"
	if !strings.Contains(table, want) {
		t.Errorf("the table lacks\n%s\nin\n%s", want, table)
	}
	if !strings.Contains(table, "| sustained loop, kept: arrival to served p99 at that rate (16 probes, 0 unserved at the end) | 498.78 ms") {
		t.Errorf("no arrival row for the kept loop in\n%s", table)
	}
}

// testdata/inturns holds the ceilings.json and choose-in-turns folder of a
// real full `make bench` run (2026-12-02, started 13:48, recorded 14:06):
// three rounds of the bare echo lookup and of choose, in turns.
func TestReportChooseInTurns(t *testing.T) {
	tableWithRows(t, "testdata/inturns",
		// Rounds (choose / bare req/s): 33422.17 / 51954.71 = 0.643,
		// 35362.38 / 61367.92 = 0.576, 31270.38 / 47972.16 = 0.652: the
		// median ratio is round 1's, beside the median figures.
		"| choose in turns with the bare echo lookup, wrk -t1 -c64 (3 rounds; median of the rounds' ratios) | 33.4k req/s | bare lookup in turns 52.0k req/s | 0.64x | >= 0.8x | no |",
		// p99s: 6.49 / 5.18 = 1.25, 8.19 / 4.25 = 1.93, 7.61 / 5.00 = 1.52.
		"| choose p99 in turns with the bare echo lookup | 7.61 ms | bare lookup in turns 5.00 ms | 1.52x | <= 2x | yes |",
	)
	// A round without its choose file is a broken run, not two rounds.
	table := reportOfChangedRun(t, "testdata/inturns", func(dir string) error {
		return os.Remove(filepath.Join(dir, FileChooseInTurns, "choose-2.txt"))
	})
	if !strings.Contains(table, "choose in turns with the bare echo lookup: not measured (no choose-2.txt)") {
		t.Errorf("a missing round's choose file was not reported:\n%s", table)
	}
}

// testdata/cpu holds the ceilings and the choose and recorded-choose
// files of a real full `make bench` run (2026-12-02, 15:38-15:56), with
// the processor time a request of each process.
func TestReportCPUARequest(t *testing.T) {
	tableWithRows(t, "testdata/cpu",
		// 7220.33 / 22557 req/s; 88.87 + 62.71 + 78.57 us against
		// 34.97 + 0.49 + 41.83 us.
		"| recorded choose / choose, vegeta 64 connections, same run | 0.32x (7220 req/s, success 1.0000) |  |  | >= 0.5x | no |",
		"| CPU a request (service + PostgreSQL + load generator), 64 connections: recorded choose / choose | 89 + 63 + 79 = 230 us / 35 + 0 + 42 = 77 us |",
		"| recorded choose / choose, vegeta 256 connections, same run | 0.57x (10.5k req/s, success 1.0000) |  |  | >= 0.5x | yes |",
		"| CPU a request (service + PostgreSQL + load generator), 256 connections: recorded choose / choose | 68 + 36 + 63 = 168 us / 41 + 0 + 53 = 94 us |",
	)
	// Files written before the figures existed read as 0: no row.
	table := reportOfChangedRun(t, "testdata/cpu", func(dir string) error {
		return os.WriteFile(filepath.Join(dir, FileChoose), []byte(`{"requests": 1000, "throughput_per_s": 20000, "success_ratio": 1}`), 0o600)
	})
	if strings.Contains(table, "CPU a request (service + PostgreSQL + load generator), 64 connections") ||
		!strings.Contains(table, "CPU a request (service + PostgreSQL + load generator), 256 connections") {
		t.Errorf("rows of processor time where none or both were read:\n%s", table)
	}
}

// reportOfChangedRun copies the bench run in src, lets change alter the
// copy, and returns the copy's table.
func reportOfChangedRun(t *testing.T, src string, change func(dir string) error) string {
	t.Helper()
	dir := t.TempDir()
	if err := os.CopyFS(dir, os.DirFS(src)); err != nil {
		t.Fatal(err)
	}
	if err := change(dir); err != nil {
		t.Fatal(err)
	}
	table, err := Report(dir)
	if err != nil {
		t.Fatal(err)
	}
	return table
}

// tableWithRows reports the bench run in dir and fails t for each row the
// table lacks.
func tableWithRows(t *testing.T, dir string, rows ...string) {
	t.Helper()
	table, err := Report(dir)
	if err != nil {
		t.Fatal(err)
	}
	for _, want := range rows {
		if !strings.Contains(table, want) {
			t.Errorf("the table lacks\n%s\nin\n%s", want, table)
		}
	}
}
