package systemtest

import (
	"fmt"
	"math"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"

	"github.com/qtally/qtally/storage/pgtest"
)

// mixPage is what the test reads off the policy page's choice charts.
type mixPage struct {
	// Bars are the action-mix chart's stacked bars: the action, the share
	// drawn (bar height over plot height) and the bar's tooltip.
	Bars []struct {
		Action string  `json:"action"`
		Drawn  float64 `json:"drawn"`
		Title  string  `json:"title"`
	} `json:"bars"`
	Legend  []string `json:"legend"`
	Unknown []string `json:"unknown"`
	// Markers are the kind and label of each event marker, per chart.
	Markers map[string][]string `json:"markers"`
}

const readMix = `(() => {
	const mix = document.querySelector('figure[data-chart="actions"]');
	const ys = [...mix.querySelectorAll('line.gridline')].map(l => +l.getAttribute('y1'));
	const plot = Math.max(...ys) - Math.min(...ys);
	const markers = {};
	for (const f of document.querySelectorAll('figure.chart')) {
		markers[f.dataset.chart] = [...f.querySelectorAll('g[data-marker]')].map(g => g.dataset.marker + ': ' + g.querySelector('text').textContent);
	}
	return {
		bars: [...mix.querySelectorAll('rect.bar')].map(r => ({action: r.dataset.name, drawn: +r.getAttribute('height') / plot, title: r.querySelector('title').textContent})),
		legend: [...mix.querySelectorAll('figcaption .key')].map(k => k.nextSibling.textContent),
		unknown: [...document.querySelectorAll('figure[data-chart="rates"] g[data-series="unknown state"] circle title')].map(t => t.textContent),
		markers,
	};
})()`

// The policy page, in a real browser, shows the mix of actions chosen as
// the choices were made (counted in the API process and stored, so any
// process's page shows them), and marks a snapshot, a settings change, a
// restore and an evaluation on the same time axis as the training charts.
func TestPolicyPageShowsChoicesAndEvents(t *testing.T) {
	t.Parallel()
	ctx := newBrowser(t)
	s := startService(t, pgtest.NewDatabase(t), "serve")
	const policy = "renewals"
	// Markup in a name shows as text.
	actions := []string{"offer_discount", "<b>remind</b>", "wait"}
	s.call("PUT", "/v1/policies/"+policy, map[string]any{"actions": actions}, 201)
	s.signIn(t, ctx)

	// 70% the first action, 20% the second, 10% the third: one allowed
	// action at a time, so each choice is that action.
	want := map[string]int{actions[0]: 70, actions[1]: 20, actions[2]: 10}
	for a, n := range want {
		for i := range n {
			s.call("POST", "/v1/policies/"+policy+"/choose",
				map[string]any{"state": fmt.Sprint("customer-", i%7), "mode": "explore", "allowed": []string{a}}, 200)
		}
	}
	s.call("POST", "/v1/policies/"+policy+"/snapshots", map[string]any{"name": "v1"}, 201)
	s.patch("/v1/policies/"+policy, `{"epsilon":0.2}`, 200)
	s.call("POST", "/v1/policies/"+policy+"/snapshots/v1/restore", nil, 200)
	// An evaluation of the live table over episodes chosen with probability 0.5.
	half := 0.5
	var eps []episodeJSON
	for i := range 20 {
		eps = append(eps, episodeJSON{ID: fmt.Sprint("renewal-", i), Steps: []stepJSON{{State: "due", Action: actions[0], Reward: 1, Probability: &half}}})
	}
	s.post(policy, eps...)
	s.waitTrained(policy, 20)
	eval, _ := startJob[evaluationResult](s, "/v1/policies/"+policy+"/evaluations",
		map[string]any{"target": map[string]any{"table": "live"}, "window": map[string]any{"last": 20}, "seed": 7, "resamples": 200}, time.Minute)
	if eval.Status != "succeeded" || eval.Result == nil {
		t.Fatalf("evaluation %+v", eval)
	}
	weighted := eval.Result.Weighted.Estimate

	// The API process stores its counts every few seconds.
	counted := regexp.MustCompile(`\(([\d,]+) of ([\d,]+)\)$`)
	var page mixPage
	waitFor(t, patience, "the page to show all 100 choices", func() bool {
		if err := chromedp.Do(ctx, chromedp.Navigate(s.URL+"/policies/"+policy+"?window=10m"), chromedp.WaitReady(chromedp.CSS("footer"))); err != nil {
			t.Fatalf("open the policy page: %v", err)
		}
		var err error
		if page, err = chromedp.Run(ctx, chromedp.Evaluate[mixPage](readMix)); err != nil {
			t.Fatalf("read the policy page: %v", err)
		}
		total := 0
		for _, b := range page.Bars {
			m := counted.FindStringSubmatch(b.Title)
			if m == nil {
				t.Fatalf("bar tooltip %q says no count", b.Title)
			}
			total += must(strconv.Atoi(strings.ReplaceAll(m[1], ",", "")))
		}
		return total == 100
	})
	screenshotCharts(t, ctx, "policy-choices.png")

	// The shares drawn, summed over the stretches the choices fell in
	// (a minute boundary may split them), are the shares chosen.
	drawn := map[string]float64{}
	for _, b := range page.Bars {
		m := counted.FindStringSubmatch(b.Title)
		columnTotal := must(strconv.Atoi(strings.ReplaceAll(m[2], ",", "")))
		drawn[b.Action] += b.Drawn * float64(columnTotal) / 100
	}
	for a, n := range want {
		// Bar heights are rounded to 0.01 of a pixel: far inside 0.5%.
		if got := drawn[a]; math.Abs(got-float64(n)/100) > 0.005 {
			t.Fatalf("the action-mix chart draws %q at %.4f of the choices, want %.2f (bars %+v)", a, got, float64(n)/100, page.Bars)
		}
	}
	if strings.Join(page.Legend, "|") != strings.Join(actions, "|") {
		t.Fatalf("legend %q, want the actions %q", page.Legend, actions)
	}
	// No state had an estimate: every choice met an unknown state.
	if len(page.Unknown) == 0 {
		t.Fatal("the rates chart has no unknown-state point")
	}
	for _, label := range page.Unknown {
		if pointValue(t, label) != 100 {
			t.Fatalf("unknown-state rate point %q, want 100 (no state has an estimate)", label)
		}
	}
	// The events are marked on the choice charts and the training charts alike.
	for _, chart := range []string{"actions", "rates", "return", "coverage"} {
		got := strings.Join(page.Markers[chart], "\n")
		for _, mark := range []string{"snapshot: snapshot v1", "settings: settings patch: epsilon", "restore: restore v1"} {
			if !strings.Contains(got, mark) {
				t.Fatalf("chart %s marks %q, want %q among them", chart, page.Markers[chart], mark)
			}
		}
	}
	// The evaluation's marker states its weighted estimate (four significant digits).
	var evaluation []string
	for _, m := range page.Markers["actions"] {
		if v, ok := strings.CutPrefix(m, "evaluation: evaluation "); ok {
			evaluation = append(evaluation, v)
		}
	}
	if len(evaluation) != 1 {
		t.Fatalf("markers %q, want one evaluation", page.Markers["actions"])
	}
	if got, err := strconv.ParseFloat(evaluation[0], 64); err != nil || math.Abs(got-weighted) > 5e-4*math.Max(1, math.Abs(weighted)) {
		t.Fatalf("the evaluation marker reads %q; the API's weighted estimate is %v", evaluation[0], weighted)
	}
	if n := must(chromedp.Run(ctx, chromedp.Evaluate[int](`document.querySelectorAll('svg b, svg i, script').length`))); n != 0 {
		t.Fatalf("%d elements were made from client-chosen names", n)
	}
}
