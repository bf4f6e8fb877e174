package systemtest

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"

	"github.com/qtally/qtally/internal/demo"
	"github.com/qtally/qtally/storage/pgtest"
)

const browserWidth = 1500

// olderHistory moves a policy's training history a second into the past,
// so that the next batch lands in a history bucket of its own: buckets take
// their time from the database's now(), which a test cannot set. Two steps,
// because rows a second apart would collide on their key if moved at once.
func olderHistory(t testing.TB, databaseURL, policy string) {
	t.Helper()
	const ofPolicy = `WHERE policy_id = (SELECT policy_id FROM policies WHERE name = $1)`
	pgtest.Exec(t, databaseURL, `UPDATE training_history SET bucket_start = bucket_start - interval '1 day' `+ofPolicy, policy)
	pgtest.Exec(t, databaseURL, `UPDATE training_history SET bucket_start = bucket_start + interval '1 day' - interval '1 second' `+ofPolicy, policy)
}

// newBrowser starts headless Chromium for one test. The flags keep it off
// the network: without them it keeps trying to reach update and sync
// services.
func newBrowser(t *testing.T) context.Context {
	t.Helper()
	path, err := exec.LookPath("chromium")
	if err != nil {
		t.Fatalf("the page tests drive a real browser and need Debian's chromium package (run scripts/setup-test-machine.sh as root, or apt-get install chromium): %v", err)
	}
	opts := []chromedp.ExecAllocatorOption{
		chromedp.ExecPath(path),
		chromedp.Headless,
		chromedp.NoSandbox,
		chromedp.DisableGPU,
		chromedp.NoFirstRun,
		chromedp.NoDefaultBrowserCheck,
		chromedp.Flag("disable-quic", true),
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.Flag("disable-extensions", true),
		chromedp.UserDataDir(t.TempDir()),
		chromedp.WindowSize(browserWidth, 1000),
	}
	allocCtx, cancelAlloc := chromedp.NewExecAllocator(context.Background(), opts...)
	browser, cancelBrowser := chromedp.NewContext(allocCtx)
	t.Cleanup(func() {
		cancelBrowser()
		cancelAlloc()
	})
	// The first call starts the browser, which lives as long as the
	// context of that call: the time limit goes on the later calls only.
	if err := chromedp.Do(browser); err != nil {
		t.Fatalf("start chromium: %v", err)
	}
	ctx, cancel := context.WithTimeout(browser, 2*time.Minute)
	t.Cleanup(cancel)
	return ctx
}

// screenshot saves a full-page PNG under test-output/ in the repository.
// It makes the viewport as tall as the page first: capturing beyond the
// viewport draws the inline SVG charts shifted.
func screenshot(t *testing.T, ctx context.Context, name string) {
	t.Helper()
	height, err := chromedp.Run(ctx, chromedp.Evaluate[int64](`document.documentElement.scrollHeight`))
	if err != nil {
		t.Fatalf("page height: %v", err)
	}
	if err = chromedp.Do(ctx, chromedp.EmulateViewport(browserWidth, height)); err != nil {
		t.Fatalf("resize the viewport: %v", err)
	}
	png, err := chromedp.Run(ctx, chromedp.CaptureScreenshot())
	if err != nil {
		t.Fatalf("screenshot: %v", err)
	}
	dir, err := filepath.Abs("test-output")
	if err != nil {
		t.Fatal(err)
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(dir, name)
	if err := os.WriteFile(path, png, 0o644); err != nil {
		t.Fatal(err)
	}
	t.Logf("screenshot: %s", path)
}

// pageData is what the test reads off a rendered page.
type pageData struct {
	Figures map[string]string `json:"figures"`
	Charts  []struct {
		ID     string `json:"id"`
		Series []struct {
			Name   string   `json:"name"`
			Points []string `json:"points"`
			Path   string   `json:"path"`
			// Outside counts points drawn outside the plot area.
			Outside int `json:"outside"`
		} `json:"series"`
	} `json:"charts"`
	StateCells  []string `json:"stateCells"`
	ActionCells []string `json:"actionCells"`
	// Injected counts elements that only exist if a client-chosen name
	// was parsed as markup.
	Injected int    `json:"injected"`
	Title    string `json:"title"`
}

// readPage reads the figures within the element the selector %s finds.
const readPage = `((scope) => {
	const figures = {};
	for (const e of document.querySelector(scope).querySelectorAll('[data-figure]')) {
		figures[e.dataset.figure] = e.dataset.figure === 'last_trained_at' ? e.getAttribute('datetime') : e.textContent.trim();
	}
	return {
		title: document.title,
		figures,
		charts: [...document.querySelectorAll('figure.chart')].map(f => {
			// The plot area: between the outermost grid lines.
			const ys = [...f.querySelectorAll('line.gridline')].map(l => +l.getAttribute('y1'));
			const axis = f.querySelector('line.baseline');
			const inside = c => +c.getAttribute('cy') >= Math.min(...ys) - 0.01 && +c.getAttribute('cy') <= Math.max(...ys) + 0.01 &&
				+c.getAttribute('cx') >= +axis.getAttribute('x1') && +c.getAttribute('cx') <= +axis.getAttribute('x2');
			return {
				id: f.dataset.chart,
				series: [...f.querySelectorAll('g[data-series]')].map(g => ({
					name: g.dataset.series,
					path: g.querySelector('path').getAttribute('d'),
					points: [...g.querySelectorAll('circle.point')].map(c => c.querySelector('title').textContent),
					outside: [...g.querySelectorAll('circle.point')].filter(c => !inside(c)).length,
				})),
			};
		}),
		stateCells: [...document.querySelectorAll('td.state')].map(e => e.textContent),
		actionCells: [...document.querySelectorAll('span.q')].map(e => e.firstChild.textContent.trim()),
		injected: document.querySelectorAll('td.state b, span.q i, td i, script').length,
	};
})(%s)`

// signIn does what a person does: opens the overview, is sent to the
// sign-in form, and pastes the harness's admin token.
func (s *service) signIn(t *testing.T, ctx context.Context) {
	t.Helper()
	secret := strings.TrimPrefix(s.authorization, "Bearer ")
	err := chromedp.Do(ctx, chromedp.Navigate(s.URL+"/"), chromedp.WaitVisible(chromedp.CSS("#token")))
	location, lerr := chromedp.Run(ctx, chromedp.Location())
	if err = errors.Join(err, lerr); err != nil || !strings.HasSuffix(location, "/sign-in") {
		t.Fatalf("the overview without a token led to %q (%v), want the sign-in form", location, err)
	}
	err = chromedp.Do(ctx, chromedp.SendKeys(chromedp.CSS("#token"), secret), chromedp.Submit(chromedp.CSS("#token")),
		chromedp.WaitReady(chromedp.CSS("table")))
	location, lerr = chromedp.Run(ctx, chromedp.Location())
	if err = errors.Join(err, lerr); err != nil || strings.HasSuffix(location, "/sign-in") {
		t.Fatalf("signing in left the browser at %q (%v)", location, err)
	}
}

// open loads a page and reads it, taking the figures within figuresIn.
func (s *service) open(t *testing.T, ctx context.Context, path, figuresIn string) pageData {
	t.Helper()
	if err := chromedp.Do(ctx, chromedp.Navigate(s.URL+path), chromedp.WaitReady(chromedp.CSS("footer"))); err != nil {
		t.Fatalf("open %s: %v", path, err)
	}
	d, err := chromedp.Run(ctx, chromedp.Evaluate[pageData](fmt.Sprintf(readPage, must(json.Marshal(figuresIn)))))
	if err != nil {
		t.Fatalf("read %s: %v", path, err)
	}
	return d
}

type jsonStatus struct {
	Revision      int64      `json:"revision"`
	Episodes      int64      `json:"episodes"`
	Backlog       int64      `json:"backlog"`
	States        int64      `json:"states"`
	Pairs         int64      `json:"pairs"`
	LastTrainedAt *time.Time `json:"last_trained_at"`
}

// checkFigures compares the figures a page shows with the JSON API's.
func checkFigures(t *testing.T, where string, shown map[string]string, st jsonStatus) {
	t.Helper()
	for name, want := range map[string]int64{"revision": st.Revision, "episodes": st.Episodes, "backlog": st.Backlog, "states": st.States, "pairs": st.Pairs} {
		got, err := strconv.ParseInt(strings.ReplaceAll(shown[name], ",", ""), 10, 64)
		if err != nil || got != want {
			t.Fatalf("%s shows %s %q; the JSON API says %d", where, name, shown[name], want)
		}
	}
	if st.LastTrainedAt == nil {
		t.Fatalf("%s: the JSON API has no last training time", where)
	}
	if want := st.LastTrainedAt.UTC().Format(time.RFC3339); shown["last_trained_at"] != want {
		t.Fatalf("%s shows last training at %q; the JSON API says %s", where, shown["last_trained_at"], want)
	}
}

// pointValue reads the number a chart point's tooltip states.
func pointValue(t *testing.T, label string) float64 {
	t.Helper()
	i := strings.LastIndex(label, ": ")
	v, err := strconv.ParseFloat(label[i+2:], 64)
	if i < 0 || err != nil {
		t.Fatalf("point label %q has no value", label)
	}
	return v
}

// The status pages, in a real browser, after a few training batches: the
// charts carry one point per batch with the right values, the figures are
// the JSON API's, and names with markup in them show as text.
func TestStatusPageInBrowser(t *testing.T) {
	t.Parallel()
	ctx := newBrowser(t)
	// Recent history is kept per second (the default), so a few batches a
	// second apart give the charts several points.
	s := startService(t, pgtest.NewDatabase(t), "serve", "--batch-episodes", "1000")
	const policy = "dunning.eu-west_2"
	actions := []string{"wait & see", "<i>call</i>", `"email"`}
	const gamma = 0.9
	s.call("PUT", "/v1/policies/"+policy, map[string]any{"actions": actions, "alpha": 0.25, "gamma": gamma}, 201)
	s.call("PUT", "/v1/policies/idle-one", map[string]any{"actions": []string{"a", "b"}}, 201)
	s.signIn(t, ctx)

	rng := rand.New(rand.NewPCG(11, 12))
	const batches = 5
	var posted int64
	var wantMeans []float64
	for b := range batches {
		eps := reminderEpisodes(rng, fmt.Sprint("b", b), 15+5*b, actions)
		sum := 0.0
		for _, ep := range eps {
			g := 0.0
			for i := len(ep.Steps) - 1; i >= 0; i-- {
				g = ep.Steps[i].Reward + gamma*g
			}
			sum += g
		}
		wantMeans = append(wantMeans, sum/float64(len(eps)))
		s.call("POST", "/v1/policies/"+policy+"/episodes", map[string]any{"episodes": eps}, 202)
		posted += int64(len(eps))
		s.waitTrained(policy, posted)
		olderHistory(t, s.databaseURL, policy)
	}
	var st jsonStatus
	s.call("GET", "/v1/policies/"+policy, nil, 200).decode(t, &st)
	if st.Revision != batches {
		t.Fatalf("%d training batches, want one per posted batch (%d)", st.Revision, batches)
	}

	overview := s.open(t, ctx, "/", `tr[data-policy="`+policy+`"]`)
	screenshot(t, ctx, "status-overview.png")
	checkFigures(t, "the overview", overview.Figures, st)

	page := s.open(t, ctx, "/policies/"+policy+"?window=2m", "section.figures")
	screenshot(t, ctx, "status-page.png")
	checkFigures(t, "the policy page", page.Figures, st)
	if !strings.HasPrefix(page.Title, policy) {
		t.Fatalf("page title %q", page.Title)
	}

	charts := map[string][][]string{}
	for _, c := range page.Charts {
		for _, sr := range c.Series {
			charts[c.ID] = append(charts[c.ID], sr.Points)
			if len(sr.Points) > 0 && !strings.HasPrefix(sr.Path, "M") {
				t.Fatalf("chart %s series %s has points but no line: %q", c.ID, sr.Name, sr.Path)
			}
			if sr.Outside > 0 {
				t.Fatalf("chart %s series %s draws %d of its points outside the plot", c.ID, sr.Name, sr.Outside)
			}
		}
	}
	for id, series := range map[string]int{"learning": 1, "return": 1, "drift": 1, "churn": 1, "backlog": 1, "coverage": 2} {
		if len(charts[id]) != series {
			t.Fatalf("chart %s has %d series, want %d (charts: %v)", id, len(charts[id]), series, charts)
		}
		for _, points := range charts[id] {
			// The backlog is sampled at most every few seconds.
			if len(points) != batches && (id != "backlog" || len(points) < 1 || len(points) > batches) {
				t.Fatalf("chart %s has %d points, want one per batch (%d): %q", id, len(points), batches, points)
			}
		}
	}
	var trained int64
	for i, label := range charts["return"][0] {
		// Four significant digits are shown.
		if got, want := pointValue(t, label), wantMeans[i]; math.Abs(got-want) > 5e-4*math.Max(1, math.Abs(want)) {
			t.Fatalf("return point %d reads %q; the batch's mean G0 is %v", i, label, want)
		}
		// The learning curve has the same means, after each batch's episodes.
		trained += int64(15 + 5*i)
		if want := fmt.Sprintf("after %s episodes mean return: ", formatThousands(trained)); !strings.HasPrefix(charts["learning"][0][i], want) ||
			pointValue(t, charts["learning"][0][i]) != pointValue(t, label) {
			t.Fatalf("learning curve point %d reads %q; want %q and the return chart's %q", i, charts["learning"][0][i], want, label)
		}
	}
	for i, label := range charts["backlog"][0] {
		if pointValue(t, label) != 0 {
			t.Fatalf("backlog point %d reads %q, but every batch trained all that was waiting", i, label)
		}
	}
	coverage := charts["coverage"]
	if last := coverage[0][batches-1]; pointValue(t, last) != float64(st.States) {
		t.Fatalf("coverage ends at %q states; the policy has %d", last, st.States)
	}
	if last := coverage[1][batches-1]; pointValue(t, last) != float64(st.Pairs) {
		t.Fatalf("coverage ends at %q pairs; the policy has %d", last, st.Pairs)
	}
	for i := 1; i < batches; i++ {
		if pointValue(t, coverage[1][i]) < pointValue(t, coverage[1][i-1]) {
			t.Fatalf("pairs covered fell from %q to %q", coverage[1][i-1], coverage[1][i])
		}
	}

	// Names with markup show as the text they are.
	if page.Injected != 0 {
		t.Fatalf("%d elements were made from client-chosen names", page.Injected)
	}
	if !contains(page.StateCells, `<b>overdue & "large"</b>`) {
		t.Fatalf("the state with markup in its name is not shown as text: %q", page.StateCells)
	}
	for _, a := range actions {
		if !contains(page.ActionCells, a) {
			t.Fatalf("action %q is not shown as text: %q", a, page.ActionCells)
		}
	}
	raw := s.send("GET", "/policies/"+policy+"?window=2m", "", nil, false)
	if err := os.WriteFile(filepath.Join("test-output", "status-page.html"), raw.Body, 0o644); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(string(raw.Body), "&lt;b&gt;overdue &amp; &#34;large&#34;&lt;/b&gt;") || strings.Contains(string(raw.Body), "<i>call</i>") {
		t.Fatal("the page source does not escape client-chosen names")
	}

	// Every state, a page at a time, in the browser too.
	var seen []string
	next := "/policies/" + policy + "/states?sort=visits&limit=10"
	for next != "" {
		type statesPage struct {
			Cells []string `json:"cells"`
			Next  string   `json:"next"`
		}
		if err := chromedp.Do(ctx, chromedp.Navigate(s.URL+next), chromedp.WaitReady(chromedp.CSS("footer"))); err != nil {
			t.Fatal(err)
		}
		pg, err := chromedp.Run(ctx, chromedp.Evaluate[statesPage](`({
			cells: [...document.querySelectorAll('td.state')].map(e => e.textContent),
			next: (document.querySelector('a[rel=next]') || {}).search || '',
		})`))
		if err != nil {
			t.Fatal(err)
		}
		cells, href := pg.Cells, pg.Next
		seen = append(seen, cells...)
		next = ""
		if href != "" {
			next = "/policies/" + policy + "/states" + href
		}
	}
	if int64(len(seen)) != st.States {
		t.Fatalf("the state pages list %d states; the policy has %d", len(seen), st.States)
	}
}

// formatThousands prints n with a comma between each group of three digits.
func formatThousands(n int64) string {
	s := strconv.FormatInt(n, 10)
	for i := len(s) - 3; i > 0; i -= 3 {
		s = s[:i] + "," + s[i:]
	}
	return s
}

func contains(list []string, s string) bool {
	for _, x := range list {
		if x == s {
			return true
		}
	}
	return false
}

// The pages refuse what they cannot show, saying what is wrong.
func TestStatusPagesRefuseBadInput(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	s.call("PUT", "/v1/policies/plain", map[string]any{"actions": []string{"a", "b"}}, 201)
	r := s.call("GET", "/", nil, 200)
	if !strings.HasPrefix(r.Header.Get("Content-Type"), "text/html") || !strings.Contains(string(r.Body), `href="/policies/plain"`) {
		t.Fatalf("overview: %s %s", r.Header.Get("Content-Type"), r.Body)
	}
	if body := string(s.call("GET", "/policies/plain", nil, 200).Body); !strings.Contains(body, "No training in this window.") {
		t.Fatal("a policy never trained should say its charts have no data")
	}
	s.call("GET", "/policies/nobody", nil, 404)
	for _, w := range []string{"5", "30s", "49h", "soon"} {
		r = s.send("GET", "/policies/plain?window="+w, "", nil, true)
		if r.Status != 400 || !strings.Contains(string(r.Body), `"field":"window"`) {
			t.Fatalf("window=%s: %d %s", w, r.Status, r.Body)
		}
	}
	r = s.send("GET", "/policies/plain/states?sort=alphabet", "", nil, true)
	if r.Status != 400 || !strings.Contains(string(r.Body), `"field":"sort"`) {
		t.Fatalf("sort=alphabet: %d %s", r.Status, r.Body)
	}
}

// A new user's first minute: the demo's customers run against a fresh
// service, and the policy page shows the learning curve. The charts span
// the policy's life in one-second points, the learning curve rises towards
// the demo's exact optimum, drawn as the policy's return target, and the
// page is a screenshot for the README (make screenshot).
func TestLearningCurveInBrowser(t *testing.T) {
	t.Parallel()
	ctx := newBrowser(t)
	s := startService(t, pgtest.NewDatabase(t), "serve")
	cfg := demo.DefaultConfig()
	// Thousands of episodes, paced so that they span most of a minute
	// (on a machine too slow for the pace they take longer);
	// QTALLY_SCREENSHOT_DEMO=full runs what `make dev` runs instead.
	if os.Getenv("QTALLY_SCREENSHOT_DEMO") != "full" {
		cfg.Episodes, cfg.Rate, cfg.BatchSize = 6000, 150, 50
	}
	cfg.BaseURL = s.URL
	cfg.Token = strings.TrimPrefix(s.authorization, "Bearer ")
	cfg.SettleTimeout = 2 * time.Minute
	runCtx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
	defer cancel()
	report, err := demo.Run(runCtx, cfg, io.Discard)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("\n%s", report)
	if report.Untrained != 0 {
		t.Fatalf("%d episodes were still untrained", report.Untrained)
	}

	var policy struct {
		ReturnTarget *struct {
			Value float64 `json:"value"`
			Label string  `json:"label"`
		} `json:"return_target"`
	}
	s.call("GET", "/v1/policies/"+cfg.Policy, nil, 200).decode(t, &policy)
	if policy.ReturnTarget == nil || policy.ReturnTarget.Value != report.Optimal || policy.ReturnTarget.Label != "exact optimum" {
		t.Fatalf("the demo's policy has return target %+v, want its exact optimum %v", policy.ReturnTarget, report.Optimal)
	}

	s.signIn(t, ctx)
	page := s.open(t, ctx, "/policies/"+cfg.Policy, "section.figures")
	if page.Injected != 0 {
		t.Fatalf("the page has %d script or injected elements; the charts must draw without script", page.Injected)
	}
	screenshotCharts(t, ctx, "policy-page.png")
	charts := map[string][]string{}
	for _, c := range page.Charts {
		if len(c.Series) > 0 {
			charts[c.ID] = c.Series[0].Points
		}
		for _, sr := range c.Series {
			if sr.Outside > 0 {
				t.Fatalf("chart %s series %s draws %d of its points outside the plot", c.ID, sr.Name, sr.Outside)
			}
		}
	}
	for _, id := range []string{"learning", "return"} {
		if n := len(charts[id]); n < 30 {
			t.Fatalf("chart %s has %d points after a %s run of %d episodes; want at least 30", id, n, report.Elapsed.Round(time.Second), report.Episodes)
		}
	}

	// The curve rises: the mean of its last fifth of points is well above
	// that of its first fifth, by at least a tenth of the way from there to
	// the optimum (6,000 episodes are a fifth of the demo's full run, and the
	// curve is of exploring behaviour, which stays below the optimum; runs
	// here rose by 23% to 40% of the way, less when a busy machine trains
	// late and the demo explores on older estimates; each fifth averages
	// about 1,200 episodes, so a tenth of the way, about 0.7, is many
	// standard errors of either mean).
	curve := charts["learning"]
	fifth := len(curve) / 5
	mean := func(labels []string) float64 {
		sum := 0.0
		for _, l := range labels {
			sum += pointValue(t, l)
		}
		return sum / float64(len(labels))
	}
	early, late := mean(curve[:fifth]), mean(curve[len(curve)-fifth:])
	t.Logf("learning curve: %d points, early mean %.3f, late mean %.3f, optimum %.3f", len(curve), early, late, report.Optimal)
	if late-early < (report.Optimal-early)/10 {
		t.Fatalf("the learning curve does not rise: early mean %.3f, late mean %.3f, optimum %.3f", early, late, report.Optimal)
	}
	lastLabel := curve[len(curve)-1]
	if want := "after " + formatThousands(int64(report.Episodes)) + " episodes"; !strings.HasPrefix(lastLabel, want) {
		t.Fatalf("the learning curve ends at %q; want %q (every episode trained)", lastLabel, want)
	}

	// The target line is drawn on both return charts.
	targets, err := chromedp.Run(ctx, chromedp.Evaluate[[]string](`[...document.querySelectorAll('figure.chart g.target')].map(g => g.closest('figure').dataset.chart + ': ' + g.dataset.target)`))
	if err != nil {
		t.Fatal(err)
	}
	label := "exact optimum " + strconv.FormatFloat(report.Optimal, 'f', -1, 64)
	if len(targets) != 2 || !strings.HasPrefix(targets[0], "learning: exact optimum ") || !strings.HasPrefix(targets[1], "return: exact optimum ") {
		t.Fatalf("target lines %q, want the learning and return charts to show %s", targets, label)
	}
}

// screenshotCharts saves the top of the page, down to the charts, as a
// PNG under test-output/.
func screenshotCharts(t *testing.T, ctx context.Context, name string) {
	t.Helper()
	bottom, err := chromedp.Run(ctx, chromedp.Evaluate[float64](`document.querySelector('section.charts').getBoundingClientRect().bottom + window.scrollY + 16`))
	if err != nil {
		t.Fatalf("find the charts: %v", err)
	}
	if err = chromedp.Do(ctx, chromedp.EmulateViewport(browserWidth, int64(bottom))); err != nil {
		t.Fatalf("resize the viewport: %v", err)
	}
	png, err := chromedp.Run(ctx, chromedp.CaptureScreenshot())
	if err != nil {
		t.Fatalf("screenshot: %v", err)
	}
	if err := os.MkdirAll("test-output", 0o755); err != nil {
		t.Fatal(err)
	}
	path := filepath.Join("test-output", name)
	if err := os.WriteFile(path, png, 0o644); err != nil {
		t.Fatal(err)
	}
	t.Logf("screenshot: %s", path)
}

// A policy's return target is a setting of its own: stored and answered
// as given, replaced by the next PUT, drawn on the page, and refused with
// the field named when it is incomplete or out of range.
func TestReturnTargetIsAPolicySetting(t *testing.T) {
	t.Parallel()
	s := startService(t, pgtest.NewDatabase(t))
	const path = "/v1/policies/shipping"
	put := func(target any, status int) reply {
		t.Helper()
		body := map[string]any{"actions": []string{"courier", "post"}}
		if target != nil {
			body["return_target"] = target
		}
		sender := s
		if status == 200 {
			sender = s.withHeader("If-Match", "*") // replace what is there
		}
		return sender.send("PUT", path, "application/json", must(json.Marshal(body)), status >= 400)
	}
	if r := put(map[string]any{"value": 12.5, "label": "best rule of the old system"}, 201); r.Status != 201 ||
		!strings.Contains(string(r.Body), `"return_target":{"value":12.5,"label":"best rule of the old system"}`) {
		t.Fatalf("PUT with a target: %d %s", r.Status, r.Body)
	}
	if body := string(s.call("GET", path, nil, 200).Body); !strings.Contains(body, `"return_target":{"value":12.5,"label":"best rule of the old system"}`) {
		t.Fatalf("the status does not carry the target: %s", body)
	}
	page := string(s.call("GET", "/policies/shipping", nil, 200).Body)
	if strings.Count(page, `data-target="best rule of the old system 12.5"`) != 2 {
		t.Fatal("the page should draw the target on the learning curve and the mean return chart")
	}
	if r := put(nil, 200); strings.Contains(string(r.Body), "return_target") {
		t.Fatalf("a PUT without a target keeps one: %s", r.Body)
	}
	if page := string(s.call("GET", "/policies/shipping", nil, 200).Body); strings.Contains(page, "data-target") {
		t.Fatal("a policy without a target has a target line")
	}
	for _, c := range []struct {
		target any
		field  string
	}{
		{map[string]any{"label": "goal"}, "return_target.value"},
		{map[string]any{"value": 1e16}, "return_target.value"},
		{map[string]any{"value": 1, "label": strings.Repeat("x", 65)}, "return_target.label"},
		{map[string]any{"value": 1, "label": "goal\n"}, "return_target.label"},
	} {
		r := put(c.target, 400)
		if r.Status != 400 || !strings.Contains(string(r.Body), `"field":"`+c.field+`"`) {
			t.Fatalf("target %v: %d %s; want 400 naming %s", c.target, r.Status, r.Body, c.field)
		}
	}
	if body := string(s.call("GET", path, nil, 200).Body); strings.Contains(body, "return_target") {
		t.Fatalf("a refused PUT changed the policy: %s", body)
	}
}
