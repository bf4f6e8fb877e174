package api

import (
	"bytes"
	"cmp"
	"embed"
	"fmt"
	"html/template"
	"math"
	"net/http"
	"net/url"
	"slices"
	"strconv"
	"time"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/internal/views"
	"github.com/qtally/qtally/training"
)

// The status pages are plain HTML from html/template, which escapes every
// name clients chose (policies, actions, states) for its context.
//
//go:embed pages/*.html
var pageFiles embed.FS

var pages = parsePages("overview.html", "policy.html", "states.html", "signin.html")

func parsePages(names ...string) map[string]*template.Template {
	funcs := template.FuncMap{"num": formatNumber, "count": formatCount, "ago": formatAgo, "stamp": formatStamp}
	layout := template.Must(template.New("layout.html").Funcs(funcs).ParseFS(pageFiles, "pages/layout.html"))
	out := make(map[string]*template.Template, len(names))
	for _, n := range names {
		out[n] = template.Must(template.Must(layout.Clone()).ParseFS(pageFiles, "pages/"+n))
	}
	return out
}

// renderPage answers with a page, or with the error if it fails to render
// (before anything is sent).
func renderPage(c echo.Context, name string, view any) error {
	var buf bytes.Buffer
	if err := pages[name].ExecuteTemplate(&buf, "layout.html", view); err != nil {
		return fmt.Errorf("render %s: %w", name, err)
	}
	pageSecurityHeaders(c)
	return c.HTMLBlob(http.StatusOK, buf.Bytes())
}

// Page settings.
const (
	defaultWindow = 6 * time.Hour
	minWindow     = time.Minute
	topStates     = 10
	// behindAfter is how long an untrained episode may wait before the
	// pages call its policy behind.
	behindAfter = time.Minute
)

type pageBase struct {
	Title string
	Now   time.Time
	// Refresh reloads the page after this many seconds; 0 never.
	Refresh int
	// SignOut shows a sign-out button: the page was opened in a session.
	SignOut bool
}

type policyRow struct {
	views.PolicyStatus
	Progress string
	Behind   bool
}

func newPolicyRow(st views.PolicyStatus, now time.Time) policyRow {
	r := policyRow{PolicyStatus: st}
	switch {
	case st.Episodes == 0:
		r.Progress = "no episodes yet"
	case st.Backlog == 0:
		r.Progress = "all trained"
	default:
		r.Progress = formatCount(st.Backlog) + " waiting"
		if st.OldestUntrained != nil {
			waited := now.Sub(*st.OldestUntrained)
			r.Progress += ", oldest for " + formatDuration(waited)
			r.Behind = waited > behindAfter
		}
	}
	return r
}

type overviewView struct {
	pageBase
	Policies []policyRow
}

func handleOverview(p Policies) echo.HandlerFunc {
	return func(c echo.Context) error {
		list, err := p.ListPolicyStatus(c.Request().Context())
		if err != nil {
			return err
		}
		v := overviewView{pageBase: pageBase{Title: "Policies", Now: time.Now(), Refresh: 30, SignOut: inSession(c)}}
		for _, st := range coveredPolicies(c, list) {
			v.Policies = append(v.Policies, newPolicyRow(st, v.Now))
		}
		return renderPage(c, "overview.html", v)
	}
}

type actionQ struct {
	Action string
	Q      float64
	Greedy bool
	// Untried: never tried in the state, so Q is the initial value, not
	// something learned.
	Untried bool
}

type stateRow struct {
	views.StateSummary
	Ago string
	// Best holds the actions of highest Q first; Hidden counts the rest.
	Best   []actionQ
	Hidden int
}

// shownActions bounds the actions listed per state; policies may have many.
const shownActions = 5

func newStateRows(states []views.StateSummary, now time.Time) []stateRow {
	rows := make([]stateRow, len(states))
	for i, s := range states {
		r := stateRow{StateSummary: s, Ago: formatAgo(now, &s.UpdatedAt)}
		for _, a := range s.Actions {
			r.Best = append(r.Best, actionQ{Action: a.Action, Q: a.Q, Greedy: a.Action == s.GreedyAction, Untried: a.Visits == 0})
		}
		slices.SortStableFunc(r.Best, func(a, b actionQ) int {
			switch {
			case a.Greedy != b.Greedy:
				if a.Greedy {
					return -1
				}
				return 1
			case a.Untried != b.Untried:
				if b.Untried {
					return -1
				}
				return 1
			case a.Q > b.Q:
				return -1
			case a.Q < b.Q:
				return 1
			}
			return 0
		})
		if len(r.Best) > shownActions {
			r.Hidden = len(r.Best) - shownActions
			r.Best = r.Best[:shownActions]
		}
		rows[i] = r
	}
	return rows
}

type windowLink struct {
	Label   string
	URL     string
	Current bool
}

type policyView struct {
	pageBase
	policyRow
	// Span names what the charts cover: the window, or the policy's
	// activity so far when it began within the window.
	Span        string
	Windows     []windowLink
	Charts      []chartView
	MostDrift   []stateRow
	MostVisited []stateRow
	StatesURL   string
	// Changes are the latest settings changes, newest first.
	Changes []training.SettingsChangeRecord
	// Open is the policy's open episodes: how many, ended and abandoned.
	Open training.OpenEpisodeFigures
}

// shownChanges bounds the settings changes the policy page lists; the
// API pages through all of them.
const shownChanges = 10

func handlePolicyPage(reports PolicyReports, h SettingsHistory, open OpenEpisodes, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, err := policyParam(c)
		if err != nil {
			return err
		}
		window, err := windowParam(c, cfg.HistoryWindow)
		if err != nil {
			return err
		}
		report, err := reports.PolicyReport(c.Request().Context(), name, window, topStates)
		if err != nil {
			return err
		}
		changes, err := h.SettingsHistory(c.Request().Context(), name, 0, shownChanges)
		if err != nil {
			return err
		}
		figures, err := open.PolicyOpenEpisodes(c.Request().Context(), name)
		if err != nil {
			return err
		}
		now := time.Now()
		v := policyView{
			Changes:     changes.Changes,
			Open:        figures,
			pageBase:    pageBase{Title: name, Now: now, Refresh: 30, SignOut: inSession(c)},
			policyRow:   newPolicyRow(report.Status, now),
			Span:        chartSpan(report),
			Charts:      historyCharts(report),
			MostDrift:   newStateRows(report.MostDrift, now),
			MostVisited: newStateRows(report.MostVisited, now),
			StatesURL:   "/policies/" + url.PathEscape(name) + "/states",
		}
		for _, w := range []time.Duration{10 * time.Minute, time.Hour, 6 * time.Hour, 24 * time.Hour, 48 * time.Hour} {
			if w < cfg.HistoryWindow {
				v.Windows = append(v.Windows, windowLink{Label: formatDuration(w), URL: "?window=" + windowQuery(w), Current: w == window})
			}
		}
		// The last reaches as far back as history is kept.
		kept := cfg.HistoryWindow
		v.Windows = append(v.Windows, windowLink{Label: formatDuration(kept) + " (all kept)", URL: "?window=" + windowQuery(kept), Current: kept == window})
		return renderPage(c, "policy.html", v)
	}
}

// windowParam reads how far back the charts reach.
func windowParam(c echo.Context, kept time.Duration) (time.Duration, error) {
	s := c.QueryParam("window")
	if s == "" {
		return min(defaultWindow, kept), nil
	}
	w, err := time.ParseDuration(s)
	if lo := min(minWindow, kept); err != nil || w < lo || w > kept {
		return 0, training.Invalid(-1, -1, "window", "must be a duration such as 90m or 6h, from %v to the %v of history kept", lo, kept)
	}
	return w, nil
}

// windowQuery writes a window as the window parameter reads it.
func windowQuery(w time.Duration) string {
	switch {
	case w%time.Hour == 0:
		return strconv.FormatInt(int64(w/time.Hour), 10) + "h"
	case w%time.Minute == 0:
		return strconv.FormatInt(int64(w/time.Minute), 10) + "m"
	}
	return w.String()
}

// chartSpan names what the time charts cover.
func chartSpan(r views.PolicyReport) string {
	last := "Last " + formatDuration(r.Window)
	// A minute's slack: the oldest row kept may start just inside the window.
	if since := r.ActiveSince(); since.After(r.Now.Add(-r.Window + time.Minute)) {
		return last + ": activity began " + formatDuration(r.Now.Sub(since)) + " ago"
	}
	return last
}

// maxChartPoints bounds the points of a chart, whatever the span.
const maxChartPoints = 180

// historyCharts draws the report's history: what to look at to tell
// whether a policy learns (return rises towards its target, drift falls),
// is stuck (backlog grows) or keeps changing its mind (churn).
func historyCharts(r views.PolicyReport) []chartView {
	var targets []targetLine
	if t := r.Status.ReturnTarget; t != nil && t.Value != nil {
		label := t.Label
		if label == "" {
			label = "target"
		}
		targets = append(targets, targetLine{value: *t.Value, label: label})
	}

	// The learning curve: mean return against episodes trained.
	progress := r.Progress(maxChartPoints)
	var curve seriesData
	curve.name = "mean return"
	trained := 0.0
	for _, p := range progress.Points {
		trained += float64(p.Episodes)
		if p.Episodes > 0 {
			curve.add(trained, p.MeanReturn())
		}
	}
	counted := "episodes trained"
	if r.Status.CreatedAt.Before(r.Now.Add(-r.Window)) {
		// The policy is older than the history shown: count from its start.
		counted += " since " + progress.From.UTC().Format("Jan 2 15:04")
	}
	learning := newChart("learning", "Learning curve", "mean discounted return G0 as played (exploring included) against "+counted+", per "+formatDuration(progress.Step)+" of training",
		countAxis(trained, "episodes"), false, targets, curve)

	line := r.Timeline(maxChartPoints)
	axis := timeAxis(line.From, line.To, 3*line.Step)
	var ret, drift, churn, backlog, states, pairs seriesData
	ret.name, drift.name, churn.name, backlog.name = "mean return", "mean |ΔQ|", "greedy changes", "backlog"
	states.name, pairs.name = "states", "pairs"
	for _, p := range line.Points {
		at := unixSeconds(p.Start)
		if p.Episodes > 0 {
			ret.add(at, p.MeanReturn())
		}
		if p.Updates > 0 {
			drift.add(at, p.MeanDrift())
		}
		churn.add(at, float64(p.GreedyChanges))
		if p.Backlog != nil {
			backlog.add(at, float64(*p.Backlog))
		}
		states.add(at, float64(p.States))
		pairs.add(at, float64(p.Pairs))
	}
	// Samples of the backlog may be further apart than points.
	backlogAxis := timeAxis(line.From, line.To, 3*max(line.Step, training.BacklogSampleEvery))
	step := formatDuration(line.Step)
	mix, rates := choiceCharts(r, line, axis)
	timed := []chartView{
		mix,
		rates,
		newChart("return", "Mean return", "discounted return G0 of the episodes trained, per "+step, axis, false, targets, ret),
		newChart("drift", "Mean |ΔQ| per update", "how far updates move the estimates, per "+step, axis, true, nil, drift),
		newChart("churn", "Greedy changes", "states whose greedy action changed, per "+step, axis, true, nil, churn),
		newChart("backlog", "Backlog", "episodes waiting, sampled at most every "+formatDuration(max(line.Step, training.BacklogSampleEvery)), backlogAxis, true, nil, backlog),
		newChart("coverage", "Coverage", "states and (state, action) pairs with an estimate", axis, true, nil, states, pairs),
	}
	// Snapshots, restores, settings changes and evaluations on every time
	// chart, so that what followed them shows beside them.
	events := eventMarks(r.Events)
	for i := range timed {
		timed[i].addMarkers(axis, events)
	}
	return append([]chartView{learning}, timed...)
}

// eventMarks names the policy's events for the charts.
func eventMarks(events []training.PolicyEvent) []eventMark {
	marks := make([]eventMark, 0, len(events))
	for _, e := range events {
		label := e.Kind
		switch {
		case e.Kind == "settings":
			label = "settings " + e.Label
		case e.Kind == "evaluation" && e.Value != nil:
			label = "evaluation " + formatNumber(*e.Value)
		case e.Kind == "evaluation":
			label = "evaluation (no estimate)"
		case e.Label != "":
			label = e.Kind + " " + e.Label
		}
		marks = append(marks, eventMark{at: unixSeconds(e.At), kind: e.Kind, label: label})
	}
	return marks
}

// choiceCharts draws what API processes chose over the timeline's span:
// the share of each action, and how often choices explored or met a state
// with no estimate yet.
func choiceCharts(r views.PolicyReport, line views.HistoryView, axis xAxis) (chartView, chartView) {
	view := r.Choices(line.From, line.To, maxChartPoints)
	actions := r.Status.Actions
	totals := make([]int64, len(actions))
	for _, p := range view.Points {
		for a, n := range p.ByAction {
			if a < len(totals) {
				totals[a] += n
			}
		}
	}
	// Each action its own colour, or the most chosen ones and the rest.
	shown := make([]int, len(actions)) // action index -> class
	names := slices.Clone(actions)
	other := len(actions) > shareColours
	if other {
		order := make([]int, len(actions))
		for i := range order {
			order[i] = i
		}
		slices.SortStableFunc(order, func(a, b int) int { return cmp.Compare(totals[b], totals[a]) })
		top := order[:shareColours-1]
		slices.Sort(top)
		names = names[:0]
		for i := range shown {
			shown[i] = shareColours - 1
		}
		for class, a := range top {
			shown[a] = class
			names = append(names, actions[a])
		}
		names = append(names, fmt.Sprintf("other %d actions", len(actions)-len(top)))
	} else {
		for i := range shown {
			shown[i] = i
		}
	}
	var columns []shareColumn
	var explored, unknown seriesData
	explored.name, unknown.name = "explored", "unknown state"
	for _, p := range view.Points {
		col := shareColumn{from: unixSeconds(p.Start), to: unixSeconds(p.Start.Add(view.Step)), total: p.Total, counts: make([]int64, len(names))}
		for a, n := range p.ByAction {
			if a < len(shown) {
				col.counts[shown[a]] += n
			}
		}
		columns = append(columns, col)
		if p.Total > 0 {
			// A point within the span, also for a stretch that began before it.
			at := max(col.from, axis.lo)
			explored.add(at, 100*float64(p.Explored)/float64(p.Total))
			unknown.add(at, 100*float64(p.Unknown)/float64(p.Total))
		}
	}
	per := formatDuration(view.Step)
	mix := newShareChart("actions", "Actions chosen", "share of each action among the choices of every API process, per "+per, axis, names, other, columns)
	ratesAxis := axis
	ratesAxis.gap = 3 * view.Step.Seconds()
	rates := newChart("rates", "Explore and unknown-state rates", "% of choices that explored, and that met a state with no estimate, per "+per,
		ratesAxis, true, nil, explored, unknown)
	rates.EmptyText = mix.EmptyText
	return mix, rates
}

type statesView struct {
	pageBase
	Policy  string
	Sort    views.StateOrder
	Sorts   []windowLink
	Rows    []stateRow
	NextURL string
}

func handleStatesPage(s States) echo.HandlerFunc {
	return func(c echo.Context) error {
		page, err := listStates(c, s)
		if err != nil {
			return err
		}
		now := time.Now()
		name, q := page.policy, page.query
		v := statesView{pageBase: pageBase{Title: name + " states", Now: now, SignOut: inSession(c)}, Policy: name, Sort: q.Order,
			Rows: newStateRows(page.States, now)}
		for _, o := range views.StateOrders {
			v.Sorts = append(v.Sorts, windowLink{Label: string(o), URL: "?sort=" + string(o), Current: o == q.Order})
		}
		if page.Next != nil {
			v.NextURL = "?" + url.Values{"sort": {string(q.Order)}, "limit": {strconv.Itoa(q.Limit)}, "cursor": {encodeCursor(page.Next)}}.Encode()
		}
		return renderPage(c, "states.html", v)
	}
}

// formatCount prints a count with thousands separators.
func formatCount(n int64) string {
	s := strconv.FormatInt(n, 10)
	start := 0
	if n < 0 {
		start = 1
	}
	for i := len(s) - 3; i > start; i -= 3 {
		s = s[:i] + "," + s[i:]
	}
	return s
}

// formatAgo says how long before now t was.
func formatAgo(now time.Time, t *time.Time) string {
	switch {
	case t == nil:
		return "never"
	case now.Sub(*t) < time.Second:
		return "just now"
	}
	return formatDuration(now.Sub(*t)) + " ago"
}

func formatStamp(t time.Time) string {
	return t.UTC().Format(time.RFC3339)
}

// formatDuration prints a duration in its two largest units, e.g. 3m 5s.
func formatDuration(d time.Duration) string {
	d = max(d, 0).Round(time.Second)
	switch {
	case d < time.Minute:
		return strconv.Itoa(int(d.Seconds())) + "s"
	case d < time.Hour:
		return joinUnits(int(d.Minutes()), "m", int(d.Seconds())%60, "s")
	case d <= 48*time.Hour:
		return joinUnits(int(d.Hours()), "h", int(d.Minutes())%60, "m")
	default:
		return joinUnits(int(math.Floor(d.Hours()/24)), "d", int(d.Hours())%24, "h")
	}
}

func joinUnits(a int, au string, b int, bu string) string {
	if b == 0 {
		return strconv.Itoa(a) + au
	}
	return strconv.Itoa(a) + au + " " + strconv.Itoa(b) + bu
}
