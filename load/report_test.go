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
	table, err := Report("testdata/run")
	if err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{
		// 9976.40 req/s against a ceiling of 4658 req/s.
		"| choose, wrk -t1 -c64 | 9976 req/s | `echo_get_lookup_rps` 4658 req/s | 2.14x | >= 0.8x | yes |",
		"| choose p99, wrk | 22.99 ms | `echo_get_p99_ms` 483.00 ms | 0.05x | <= 2.00 ms | no |",
		"| training drain vs one statement per update | 9029 steps/s | `q_naive_upsert_rows_per_s` 230 rows/s | 39.26x | >= 20x | yes |",
		"| in-memory Q copy: live heap added by 250.0k pairs (per 1M) | 51.6 MB (52 bytes/pair) |  |  | <= 200.0 MB | yes |",
	} {
		if !strings.Contains(table, want) {
			t.Errorf("the table lacks\n%s\nin\n%s", want, table)
		}
	}
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
