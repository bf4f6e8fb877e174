package api

import (
	"bytes"
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
	c.Response().Header().Set("Cache-Control", "no-store")
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
}

type policyRow struct {
	training.PolicyStatus
	Progress string
	Behind   bool
}

func newPolicyRow(st training.PolicyStatus, now time.Time) policyRow {
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
		v := overviewView{pageBase: pageBase{Title: "Policies", Now: time.Now(), Refresh: 30}}
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
}

type stateRow struct {
	training.StateSummary
	Ago string
	// Best holds the actions of highest Q first; Hidden counts the rest.
	Best   []actionQ
	Hidden int
}

// shownActions bounds the actions listed per state; policies may have many.
const shownActions = 5

func newStateRows(states []training.StateSummary, now time.Time) []stateRow {
	rows := make([]stateRow, len(states))
	for i, s := range states {
		r := stateRow{StateSummary: s, Ago: formatAgo(now, &s.UpdatedAt)}
		for _, a := range s.Actions {
			r.Best = append(r.Best, actionQ{Action: a.Action, Q: a.Q, Greedy: a.Action == s.GreedyAction})
		}
		slices.SortStableFunc(r.Best, func(a, b actionQ) int {
			switch {
			case a.Greedy != b.Greedy:
				if a.Greedy {
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
	Window      string
	Windows     []windowLink
	Charts      []chartView
	MostDrift   []stateRow
	MostVisited []stateRow
	StatesURL   string
	// Open is the policy's open episodes: how many, ended and abandoned.
	Open training.OpenEpisodeFigures
}

func handlePolicyPage(in Inspector, open OpenEpisodes, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, err := policyParam(c)
		if err != nil {
			return err
		}
		window, err := windowParam(c, cfg.HistoryWindow)
		if err != nil {
			return err
		}
		report, err := in.PolicyReport(c.Request().Context(), name, window, topStates)
		if err != nil {
			return err
		}
		figures, err := open.PolicyOpenEpisodes(c.Request().Context(), name)
		if err != nil {
			return err
		}
		now := time.Now()
		v := policyView{
			Open:        figures,
			pageBase:    pageBase{Title: name, Now: now, Refresh: 30},
			policyRow:   newPolicyRow(report.Status, now),
			Window:      formatDuration(window),
			Charts:      historyCharts(report, now),
			MostDrift:   newStateRows(report.MostDrift, now),
			MostVisited: newStateRows(report.MostVisited, now),
			StatesURL:   "/policies/" + url.PathEscape(name) + "/states",
		}
		for _, w := range []time.Duration{time.Hour, 6 * time.Hour, 24 * time.Hour, 48 * time.Hour} {
			if w <= cfg.HistoryWindow {
				v.Windows = append(v.Windows, windowLink{Label: formatDuration(w), URL: "?window=" + formatDuration(w), Current: w == window})
			}
		}
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

// historyCharts draws the report's history: what to look at to tell
// whether a policy learns (return rises, drift falls), is stuck (backlog
// grows) or keeps changing its mind (churn).
func historyCharts(r training.PolicyReport, now time.Time) []chartView {
	from := now.Add(-r.Window)
	gap := 3 * r.Step
	var ret, drift, churn, backlog, states, pairs seriesData
	ret.name, drift.name, churn.name, backlog.name = "mean return", "mean |ΔQ|", "greedy changes", "backlog"
	states.name, pairs.name = "states", "pairs"
	for _, p := range r.History {
		if p.Episodes > 0 {
			ret.add(p.Start, p.MeanReturn())
		}
		if p.Updates > 0 {
			drift.add(p.Start, p.MeanDrift())
		}
		churn.add(p.Start, float64(p.GreedyChanges))
		backlog.add(p.Start, float64(p.Backlog))
		states.add(p.Start, float64(p.States))
		pairs.add(p.Start, float64(p.Pairs))
	}
	step := formatDuration(r.Step)
	return []chartView{
		newChart("return", "Mean return", "discounted return G0 of the episodes trained, per "+step, from, now, gap, false, ret),
		newChart("drift", "Mean |ΔQ| per update", "how far updates move the estimates, per "+step, from, now, gap, true, drift),
		newChart("churn", "Greedy changes", "states whose greedy action changed, per "+step, from, now, gap, true, churn),
		newChart("backlog", "Backlog", "episodes waiting, sampled once per "+step, from, now, gap, true, backlog),
		newChart("coverage", "Coverage", "states and (state, action) pairs with an estimate", from, now, gap, true, states, pairs),
	}
}

func (s *seriesData) add(t time.Time, v float64) {
	s.times = append(s.times, t)
	s.values = append(s.values, v)
}

type statesView struct {
	pageBase
	Policy  string
	Sort    training.StateOrder
	Sorts   []windowLink
	Rows    []stateRow
	NextURL string
}

func handleStatesPage(in Inspector) echo.HandlerFunc {
	return func(c echo.Context) error {
		name, err := policyParam(c)
		if err != nil {
			return err
		}
		q, err := bindStateQuery(c)
		if err != nil {
			return err
		}
		page, err := in.ListStates(c.Request().Context(), name, q)
		if err != nil {
			return err
		}
		now := time.Now()
		v := statesView{pageBase: pageBase{Title: name + " states", Now: now}, Policy: name, Sort: q.Order,
			Rows: newStateRows(page.States, now)}
		for _, o := range training.StateOrders {
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
