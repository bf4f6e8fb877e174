package load

import (
	"bufio"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"time"
)

// Files of a bench run directory that Report reads; scripts/bench.sh
// writes them.
const (
	FileCeilings  = "ceilings.json" // run.sh --json
	FileChooseWrk = "choose-wrk.txt"
	// FileChooseInTurns is a folder of wrk outputs, bare-N.txt and
	// choose-N.txt: round N of the ceilings' bare echo lookup and of
	// choose, measured in turns.
	FileChooseInTurns = "choose-in-turns"
	FileChoose        = "choose.json"
	// FileRecordedChoose: choose that records each decision in an open episode.
	FileRecordedChoose = "recorded-choose.json"
	// FileChooseWide and FileRecordedChooseWide: the same two at 256
	// connections, where the durable commit's latency no longer caps
	// what the connections can ask.
	FileChooseWide         = "choose-256.json"
	FileRecordedChooseWide = "recorded-choose-256.json"
	FilePost               = "post.json"
	FileDrain              = "drain.json"
	FileMixed              = "mixed.json"
	// FileMixedKept: the mixed scenario with the episodes kept by qtally.
	FileMixedKept = "mixed-kept.json"
	FileMemory    = "memory.json"
	FileSustain   = "sustain.json"
	// FileSustainKept: the sustained loop with the episodes kept by qtally.
	FileSustainKept = "sustain-kept.json"
)

// Ceiling is one figure of the ceilings script's JSON output.
type Ceiling struct {
	Median float64 `json:"median"`
	Min    float64 `json:"min"`
	Max    float64 `json:"max"`
	Unit   string  `json:"unit"`
	Runs   int     `json:"runs"`
}

// WrkFigures are what a wrk run printed.
type WrkFigures struct {
	Requests  float64
	P50, P99  time.Duration
	BadStatus int // non-2xx or 3xx answers
	Errors    int // socket errors
}

// Targets of the figures (BENCHMARKS.md says where each comes from).
const (
	targetChooseRatio = 0.8
	// Choose's p99 may be at most twice the bare echo lookup's p99 of the
	// same run: an absolute bound does not hold on a shared machine, whose
	// bare server's own tail moves from run to run.
	targetChooseP99Ratio = 2.0
	// Recording a decision durably (group-committed) keeps at least half
	// of plain choose's throughput, measured in the same run.
	targetRecordedRatio = 0.5
	targetPostRatio     = 0.5
	targetDrainRatio    = 0.5
	targetDrainVsNaive  = 20
	targetDrainVsPost   = 1.0
	targetVisibilityP99 = time.Second
	targetSustainRatio  = 0.5
	targetArrivalP99    = time.Second
	targetMemory1M      = 200e6
	// A backlog is bounded when its trend is below this share of the
	// posting rate, and a run's heap does not grow when it grows by less
	// than memoryGrowthLimit.
	boundedSlopeShare = 0.02
	memoryGrowthLimit = 10e6
)

// Report reads a bench run directory and returns its table of figures,
// ceilings, ratios and targets, in markdown.
func Report(dir string) (string, error) {
	var ceilings map[string]Ceiling
	if err := readJSON(filepath.Join(dir, FileCeilings), &ceilings); err != nil {
		return "", fmt.Errorf("ceilings: %w", err)
	}
	t := &table{ceilings: ceilings}

	if wrk, err := readWrk(filepath.Join(dir, FileChooseWrk)); t.ok("choose (wrk -t1 -c64)", err) {
		t.ratio("choose, wrk -t1 -c64", wrk.Requests, "req/s", "echo_get_lookup_rps", targetChooseRatio, wrk.BadStatus+wrk.Errors)
		t.atMost("choose p99, wrk", wrk.P99, "echo_get_p99_ms", targetChooseP99Ratio)
		t.info("choose p50, wrk", fmtDuration(wrk.P50), "echo_get_p50_ms", float64(wrk.P50)/1e6)
	}
	if rounds, err := readInTurns(filepath.Join(dir, FileChooseInTurns)); t.ok("choose in turns with the bare echo lookup", err) {
		t.inTurns(rounds)
	}
	var choose Figures
	if err := readJSON(filepath.Join(dir, FileChoose), &choose); t.ok("choose (vegeta, 64 connections)", err) {
		t.info("choose, vegeta 64 connections", fmt.Sprintf("%s req/s (success %.4f)", human(choose.Throughput), choose.Success),
			"echo_get_lookup_rps", choose.Throughput)
		t.info("choose p99, vegeta", fmtDuration(choose.P99), "echo_get_p99_ms", float64(choose.P99)/1e6)
		t.recordedRatio(dir, FileRecordedChoose, choose, 64)
	}
	var chooseWide Figures
	if err := readJSON(filepath.Join(dir, FileChooseWide), &chooseWide); t.ok("choose (vegeta, 256 connections)", err) {
		t.info("choose, vegeta 256 connections", fmt.Sprintf("%s req/s (success %.4f, p99 %s)", human(chooseWide.Throughput),
			chooseWide.Success, fmtDuration(chooseWide.P99)), "", 0)
		t.recordedRatio(dir, FileRecordedChooseWide, chooseWide, 256)
	}
	var post Figures
	if err := readJSON(filepath.Join(dir, FilePost), &post); t.ok("post", err) {
		t.ratio("post episodes (20 steps, 100 per request)", post.UnitsPerSec, "steps/s", "episode_copy_steps_per_s", targetPostRatio,
			int(math.Round(float64(post.Requests)*(1-post.Success))))
		t.info("post p99 per request", fmtDuration(post.P99), "", 0)
	}
	var drain DrainReport
	if err := readJSON(filepath.Join(dir, FileDrain), &drain); t.ok("drain", err) {
		label := fmt.Sprintf("training drain (%s episodes, %s pairs)", human(float64(drain.Episodes)), human(float64(drain.Pairs)))
		t.ratio(label, drain.StepsPerSec, "steps/s", "episode_copy_steps_per_s", targetDrainRatio, 0)
		t.ratio("training drain vs one statement per update", drain.StepsPerSec, "steps/s", "q_naive_upsert_rows_per_s", targetDrainVsNaive, 0)
		if post.UnitsPerSec > 0 {
			ratio := drain.StepsPerSec / post.UnitsPerSec
			t.verdict("training drain / post, same run", fmt.Sprintf("%.2fx (%s against %s steps/s)", ratio, human(drain.StepsPerSec), human(post.UnitsPerSec)),
				fmt.Sprintf(">= %gx", targetDrainVsPost), ratio >= targetDrainVsPost)
		}
	}
	var kept MixedReport
	if err := readJSON(filepath.Join(dir, FileMixedKept), &kept); t.ok("mixed, episodes kept by qtally", err) {
		t.mixedRows(kept, "mixed: kept by qtally", "recorded chooses", "mixed, kept: backlog trend", "ending")
	}
	var mixed MixedReport
	if err := readJSON(filepath.Join(dir, FileMixed), &mixed); t.ok("mixed", err) {
		t.mixedRows(mixed, "mixed: posted", "chooses", "mixed: backlog trend", "posting")
		t.verdict(fmt.Sprintf("mixed: commit to choose p99 (%d commits, %s)", len(mixed.Visibility), mixed.VisibilitySource),
			fmtDuration(mixed.VisibilityP99)+" (p50 "+fmtDuration(mixed.VisibilityP50)+", max "+fmtDuration(mixed.VisibilityMax)+")",
			"<= "+fmtDuration(targetVisibilityP99), len(mixed.Visibility) > 0 && mixed.VisibilityP99 <= targetVisibilityP99)
		if mixed.MemoryStart != nil && mixed.MemoryEnd != nil {
			growth := float64(mixed.MemoryEnd.HeapBytes) - float64(mixed.MemoryStart.HeapBytes)
			t.verdict("mixed: live heap growth over the run",
				fmt.Sprintf("%s (%s to %s; RSS %s to %s)", signedMB(growth), mb(float64(mixed.MemoryStart.HeapBytes)), mb(float64(mixed.MemoryEnd.HeapBytes)),
					mb(float64(mixed.MemoryStart.RSSBytes)), mb(float64(mixed.MemoryEnd.RSSBytes))),
				"< "+mb(memoryGrowthLimit), growth < memoryGrowthLimit)
		}
	}
	var sustain SustainReport
	if err := readJSON(filepath.Join(dir, FileSustain), &sustain); t.ok("sustained loop", err) {
		t.sustained(sustain)
	}
	var sustainKept SustainReport
	if err := readJSON(filepath.Join(dir, FileSustainKept), &sustainKept); t.ok("sustained loop, kept by qtally", err) {
		t.sustainedKept(sustainKept, sustain)
	}
	var mem MemoryReport
	if err := readJSON(filepath.Join(dir, FileMemory), &mem); t.ok("memory", err) {
		scale := 1e6 / float64(max(mem.Pairs, 1))
		t.verdict(fmt.Sprintf("in-memory Q copy: live heap added by %s pairs (per 1M)", human(float64(mem.Pairs))),
			fmt.Sprintf("%s (%.0f bytes/pair)", mb(float64(mem.HeapAddedBytes)*scale), mem.HeapPerPair),
			"<= "+mb(targetMemory1M), float64(mem.HeapAddedBytes)*scale <= targetMemory1M)
		t.verdict("in-memory Q copy: RSS added (per 1M pairs)", mb(float64(mem.RSSAddedBytes)*scale),
			"<= "+mb(targetMemory1M), float64(mem.RSSAddedBytes)*scale <= targetMemory1M)
		t.info("in-memory Q copy: first choose (loads the policy)", fmtDuration(mem.LoadTime), "", 0)
	}
	return t.String(), nil
}

type table struct {
	ceilings map[string]Ceiling
	rows     [][6]string
	missing  []string
}

func (t *table) ok(what string, err error) bool {
	if err != nil {
		t.missing = append(t.missing, fmt.Sprintf("%s: not measured (%v)", what, err))
	}
	return err == nil
}

// turn is one round of choose measured in turns with the bare echo lookup.
type turn struct{ bare, choose WrkFigures }

// readInTurns reads the rounds of a FileChooseInTurns folder, in order.
func readInTurns(dir string) ([]turn, error) {
	var rounds []turn
	for n := 1; ; n++ {
		bare, err := readWrk(filepath.Join(dir, fmt.Sprintf("bare-%d.txt", n)))
		if err != nil && n > 1 && errors.Is(err, errNoFile) {
			return rounds, nil
		}
		if err != nil {
			return nil, err
		}
		choose, err := readWrk(filepath.Join(dir, fmt.Sprintf("choose-%d.txt", n)))
		if err != nil {
			return nil, err
		}
		if bare.Requests <= 0 || bare.P99 <= 0 {
			return nil, fmt.Errorf("round %d: the bare lookup answered nothing", n)
		}
		rounds = append(rounds, turn{bare: bare, choose: choose})
	}
}

// inTurns adds the rows of choose against the bare echo lookup measured in
// turns with it: the medians of the rounds' ratios, beside the medians of
// the two figures. Measured minutes apart, as the ceilings and the choose
// figure are, the two see a shared machine at different speeds.
func (t *table) inTurns(rounds []turn) {
	var ratios, tails, chooses, bares, chooseP99, bareP99 []float64
	failures := 0
	for _, r := range rounds {
		ratios = append(ratios, r.choose.Requests/r.bare.Requests)
		tails = append(tails, float64(r.choose.P99)/float64(r.bare.P99))
		chooses, bares = append(chooses, r.choose.Requests), append(bares, r.bare.Requests)
		chooseP99, bareP99 = append(chooseP99, float64(r.choose.P99)), append(bareP99, float64(r.bare.P99))
		failures += r.choose.BadStatus + r.choose.Errors
	}
	ratio, tail := median(ratios), median(tails)
	label := fmt.Sprintf("choose in turns with the bare echo lookup, wrk -t1 -c64 (%d rounds; median of the rounds' ratios)", len(rounds))
	row := [6]string{label, humanUnit(median(chooses), "req/s"), "bare lookup in turns " + humanUnit(median(bares), "req/s"),
		fmt.Sprintf("%.2fx", ratio), fmt.Sprintf(">= %gx", targetChooseRatio), "no"}
	if failures > 0 {
		row[1] += fmt.Sprintf(" (%d failed)", failures)
	}
	if ratio >= targetChooseRatio && failures == 0 {
		row[5] = "yes"
	}
	t.rows = append(t.rows, row)
	row = [6]string{"choose p99 in turns with the bare echo lookup", fmtDuration(time.Duration(median(chooseP99))),
		"bare lookup in turns " + fmtDuration(time.Duration(median(bareP99))), fmt.Sprintf("%.2fx", tail),
		fmt.Sprintf("<= %gx", targetChooseP99Ratio), "no"}
	if tail <= targetChooseP99Ratio {
		row[5] = "yes"
	}
	t.rows = append(t.rows, row)
}

func median(v []float64) float64 {
	s := slices.Clone(v)
	slices.Sort(s)
	if n := len(s); n%2 == 1 {
		return s[n/2]
	} else if n > 0 {
		return (s[n/2-1] + s[n/2]) / 2
	}
	return math.NaN()
}

// recordedRatio adds the row of recorded choose against plain choose
// measured with the same number of connections in the same run.
func (t *table) recordedRatio(dir, file string, choose Figures, connections int) {
	var recorded Figures
	if err := readJSON(filepath.Join(dir, file), &recorded); !t.ok(fmt.Sprintf("recorded choose (%d connections)", connections), err) || choose.Throughput <= 0 {
		return
	}
	ratio := recorded.Throughput / choose.Throughput
	t.verdict(fmt.Sprintf("recorded choose / choose, vegeta %d connections, same run", connections),
		fmt.Sprintf("%.2fx (%s req/s, success %.4f)", ratio, human(recorded.Throughput), recorded.Success),
		fmt.Sprintf(">= %gx", targetRecordedRatio), ratio >= targetRecordedRatio && recorded.Success == 1)
	t.info(fmt.Sprintf("recorded choose p99, vegeta %d connections", connections), fmtDuration(recorded.P99), "", 0)
	if recorded.ServiceCPU > 0 && choose.ServiceCPU > 0 {
		t.info(fmt.Sprintf("CPU a request (service + PostgreSQL + load generator), %d connections: recorded choose / choose", connections),
			recorded.cpuSplit()+" / "+choose.cpuSplit(), "", 0)
	}
}

// cpuSplit shows f's processor time a request: the service's, then
// PostgreSQL's and the load generator's.
func (f Figures) cpuSplit() string {
	us := func(v float64) string {
		if v <= 0 {
			return "-"
		}
		return fmt.Sprintf("%.0f", v)
	}
	return fmt.Sprintf("%s + %s + %s = %.0f us", us(f.ServiceCPU), us(f.PostgresCPU), us(f.ClientCPU), f.ServiceCPU+f.PostgresCPU+f.ClientCPU)
}

func (t *table) ceiling(name string) (Ceiling, string, bool) {
	c, ok := t.ceilings[name]
	if !ok {
		return c, "`" + name + "` missing", false
	}
	return c, fmt.Sprintf("`%s` %s", name, humanUnit(c.Median, c.Unit)), true
}

// ratio adds a throughput row: value / ceiling, which must reach target;
// failures (error answers) fail it too.
func (t *table) ratio(label string, value float64, unit, ceiling string, target float64, failures int) {
	c, cText, ok := t.ceiling(ceiling)
	row := [6]string{label, humanUnit(value, unit), cText, "", fmt.Sprintf(">= %gx", target), "no"}
	if ok && c.Median > 0 {
		r := value / c.Median
		row[3] = fmt.Sprintf("%.2fx", r)
		if r >= target && failures == 0 {
			row[5] = "yes"
		}
	}
	if failures > 0 {
		row[1] += fmt.Sprintf(" (%d failed)", failures)
	}
	t.rows = append(t.rows, row)
}

// max adds a latency row with an absolute bound, shown beside its ceiling.
// atMost adds a row of a duration whose ratio to a ceiling in
// milliseconds must stay at or below bound.
func (t *table) atMost(label string, value time.Duration, ceiling string, bound float64) {
	c, cText, ok := t.ceiling(ceiling)
	row := [6]string{label, fmtDuration(value), cText, "", fmt.Sprintf("<= %gx", bound), "no"}
	if ok && c.Median > 0 {
		r := float64(value) / 1e6 / c.Median
		row[3] = fmt.Sprintf("%.2fx", r)
		if r <= bound {
			row[5] = "yes"
		}
	}
	t.rows = append(t.rows, row)
}

// info adds a row without a target; the ratio is shown when a ceiling is
// named.
func (t *table) info(label, value, ceiling string, raw float64) {
	row := [6]string{label, value, "", "", "", ""}
	if ceiling != "" {
		c, cText, ok := t.ceiling(ceiling)
		row[2] = cText
		if ok && c.Median > 0 {
			row[3] = fmt.Sprintf("%.2fx", raw/c.Median)
		}
	}
	t.rows = append(t.rows, row)
}

// sustained adds the sustained-loop rows: the highest flat episode rate
// against the bound the ceilings give for that work (the smaller of the
// choose ceiling over the chooses of an episode and the COPY ceiling over
// its steps), and arrival to served at that rate.
func (t *table) sustained(s SustainReport) {
	label := fmt.Sprintf("sustained loop: highest flat rate (%.0f chooses and %d steps an episode; %s)",
		s.ChoosesPerEpisode, s.StepsPerEpisode, s.flatTrials())
	row := [6]string{label, "no rate kept up", "", "", fmt.Sprintf(">= %gx", targetSustainRatio), "no"}
	bound := t.sustainBound(&row, s.ChoosesPerEpisode, s.StepsPerEpisode)
	best, ok := s.best()
	if !ok {
		t.rows = append(t.rows, row)
		return
	}
	row[1] = fmt.Sprintf("%s episodes/s (%s chooses/s)", human(best.EpisodesPerSec), human(best.ChoosesPerSec))
	if bound > 0 {
		r := best.EpisodesPerSec / bound
		row[3] = fmt.Sprintf("%.2fx", r)
		if r >= targetSustainRatio {
			row[5] = "yes"
		}
	}
	t.rows = append(t.rows, row)
	t.arrival("sustained loop", best)
}

// sustainedKept adds the rows of the sustained loop with the episodes kept
// by qtally. Its bound is the ceilings' for the HTTP requests of an episode
// (a recorded choose and a reward each step, and the end) and its steps'
// COPY; no ceiling measures the durable writes every one of those requests
// makes, so the ratio is shown without a target, beside the ratio to the
// posted loop of the same run.
func (t *table) sustainedKept(s, posted SustainReport) {
	label := fmt.Sprintf("sustained loop, kept by qtally: highest flat rate (%.0f requests and %d steps an episode; %s)",
		s.RequestsPerEpisode, s.StepsPerEpisode, s.flatTrials())
	row := [6]string{label, "no rate kept up", "", "", "", ""}
	bound := t.sustainBound(&row, s.RequestsPerEpisode, s.StepsPerEpisode)
	best, ok := s.best()
	if !ok {
		t.rows = append(t.rows, row)
		return
	}
	row[1] = fmt.Sprintf("%s episodes/s (%s recorded chooses/s)", human(best.EpisodesPerSec), human(best.ChoosesPerSec))
	if p, ok := posted.best(); ok && p.EpisodesPerSec > 0 {
		row[1] += fmt.Sprintf("; %.2fx the posted loop's rate", best.EpisodesPerSec/p.EpisodesPerSec)
	}
	if bound > 0 {
		row[3] = fmt.Sprintf("%.2fx", best.EpisodesPerSec/bound)
	}
	t.rows = append(t.rows, row)
	t.arrival("sustained loop, kept", best)
}

// sustainBound fills row's ceiling cell with the smaller of the choose
// ceiling over the requests of an episode and the COPY ceiling over its
// steps, and returns it (0 when a ceiling is missing).
func (t *table) sustainBound(row *[6]string, requests float64, steps int) float64 {
	choose, okChoose := t.ceilings["echo_get_lookup_rps"]
	store, okStore := t.ceilings["episode_copy_steps_per_s"]
	if !okChoose || !okStore || requests <= 0 || steps <= 0 {
		row[2] = "`echo_get_lookup_rps` or `episode_copy_steps_per_s` missing"
		return 0
	}
	bound := min(choose.Median/requests, store.Median/float64(steps))
	row[2] = fmt.Sprintf("min(`echo_get_lookup_rps` / %.0f, `episode_copy_steps_per_s` / %d) %s episodes/s",
		requests, steps, human(bound))
	return bound
}

func (t *table) arrival(what string, best SustainTrial) {
	t.verdict(fmt.Sprintf("%s: arrival to served p99 at that rate (%d probes, %d unserved at the end)", what, best.ArrivalProbes, best.ArrivalUnserved),
		fmtDuration(best.ArrivalP99)+" (p50 "+fmtDuration(best.ArrivalP50)+", max "+fmtDuration(best.ArrivalMax)+")",
		"<= "+fmtDuration(targetArrivalP99), best.ArrivalProbes > 0 && best.ArrivalP99 <= targetArrivalP99)
}

func (s SustainReport) flatTrials() string {
	flat := 0
	for _, tr := range s.Trials {
		if tr.Flat {
			flat++
		}
	}
	return fmt.Sprintf("%d of %d trials of %.0f s flat", flat, len(s.Trials), s.TrialSec)
}

func (s SustainReport) best() (SustainTrial, bool) {
	if s.Best < 0 || s.Best >= len(s.Trials) {
		return SustainTrial{}, false
	}
	return s.Trials[s.Best], true
}

// mixedRows adds a mixed run's rate row and its backlog verdict: the
// trend must stay below boundedSlopeShare of the rate episodes arrive
// (arriving: "posting", or "ending" when qtally keeps them).
func (t *table) mixedRows(r MixedReport, label, chooses, backlogLabel, arriving string) {
	t.info(fmt.Sprintf("%s (offered %s episodes/s, %.0f s)", label, human(r.OfferedPerSec), r.DurationSec),
		fmt.Sprintf("%s episodes/s, %s %s/s, %d errors, %d skipped", human(r.EpisodesPerSec), human(r.ChoosesPerSec), chooses, r.Errors, r.Skipped), "", 0)
	bound := boundedSlopeShare * r.EpisodesPerSec
	t.verdict(backlogLabel+" (max "+human(float64(r.BacklogMax))+")",
		fmt.Sprintf("%.1f episodes/s", r.BacklogSlopePer), fmt.Sprintf("< %.1f /s (2%% of %s)", bound, arriving),
		r.BacklogSlopePer < bound && r.Errors == 0 && len(r.Backlog) > 1)
}

func (t *table) verdict(label, value, target string, met bool) {
	row := [6]string{label, value, "", "", target, "no"}
	if met {
		row[5] = "yes"
	}
	t.rows = append(t.rows, row)
}

func (t *table) String() string {
	var b strings.Builder
	b.WriteString("| figure | service | ceiling (median, same run) | ratio | target | met |\n|---|---|---|---|---|---|\n")
	for _, r := range t.rows {
		b.WriteString("| " + strings.Join(r[:], " | ") + " |\n")
	}
	for _, m := range t.missing {
		b.WriteString("\n" + m + "\n")
	}
	return b.String()
}

func readJSON(path string, v any) error {
	data, err := os.ReadFile(path)
	if errors.Is(err, fs.ErrNotExist) {
		return fmt.Errorf("no %s", filepath.Base(path))
	}
	if err != nil {
		return err
	}
	return json.Unmarshal(data, v)
}

// readWrk parses the summary wrk --latency prints.
// errNoFile: a result file is missing.
var errNoFile = errors.New("no")

func readWrk(path string) (WrkFigures, error) {
	f, err := os.Open(path)
	if errors.Is(err, fs.ErrNotExist) {
		return WrkFigures{}, fmt.Errorf("%w %s", errNoFile, filepath.Base(path))
	}
	if err != nil {
		return WrkFigures{}, err
	}
	defer f.Close()
	var w WrkFigures
	seen := 0
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		fields := strings.Fields(sc.Text())
		if len(fields) < 2 {
			continue
		}
		switch {
		case fields[0] == "Requests/sec:":
			w.Requests, err = strconv.ParseFloat(fields[1], 64)
			seen++
		case fields[0] == "50%":
			w.P50, err = parseWrkDuration(fields[1])
			seen++
		case fields[0] == "99%":
			w.P99, err = parseWrkDuration(fields[1])
			seen++
		case fields[0] == "Non-2xx":
			w.BadStatus, err = strconv.Atoi(fields[len(fields)-1])
		case fields[0] == "Socket" && len(fields) > 3:
			// Socket errors: connect 0, read 0, write 0, timeout 0
			for _, n := range fields[3:] {
				k, _ := strconv.Atoi(strings.TrimSuffix(n, ","))
				w.Errors += k
			}
		}
		if err != nil {
			return w, fmt.Errorf("%s: %q: %w", filepath.Base(path), sc.Text(), err)
		}
	}
	if seen < 3 {
		return w, fmt.Errorf("%s: no wrk --latency summary in it", filepath.Base(path))
	}
	return w, sc.Err()
}

// parseWrkDuration reads wrk's latencies: 812.00us, 1.93ms, 1.02s, 1.50m.
func parseWrkDuration(s string) (time.Duration, error) {
	for _, u := range []struct {
		suffix string
		unit   time.Duration
	}{{"us", time.Microsecond}, {"ms", time.Millisecond}, {"s", time.Second}, {"m", time.Minute}} {
		if v, ok := strings.CutSuffix(s, u.suffix); ok {
			f, err := strconv.ParseFloat(v, 64)
			return time.Duration(f * float64(u.unit)), err
		}
	}
	return 0, fmt.Errorf("unknown duration %q", s)
}

func human(v float64) string {
	switch a := math.Abs(v); {
	case a >= 1e6:
		return fmt.Sprintf("%.2fM", v/1e6)
	case a >= 1e4:
		return fmt.Sprintf("%.1fk", v/1e3)
	case a >= 100:
		return fmt.Sprintf("%.0f", v)
	default:
		return fmt.Sprintf("%.3g", v)
	}
}

func humanUnit(v float64, unit string) string {
	if unit == "ms" {
		return fmt.Sprintf("%.2f ms", v)
	}
	return human(v) + " " + unit
}

func fmtDuration(d time.Duration) string {
	switch {
	case d >= time.Second:
		return fmt.Sprintf("%.2f s", d.Seconds())
	default:
		return fmt.Sprintf("%.2f ms", float64(d)/1e6)
	}
}

func mb(b float64) string { return fmt.Sprintf("%.1f MB", b/1e6) }

func signedMB(b float64) string { return fmt.Sprintf("%+.1f MB", b/1e6) }
