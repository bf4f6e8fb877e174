package systemtest

import (
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"net/http"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/storage/pgtest"
)

const (
	prometheusConfig = "deploy/prometheus/prometheus.yml"
	dashboardFile    = "deploy/grafana/dashboards/qtally.json"
	datasourceFile   = "deploy/grafana/provisioning/datasources/qtally.yml"
)

// dashboard is the part of a Grafana dashboard JSON the checks read.
type dashboard struct {
	UID        string  `json:"uid"`
	Panels     []panel `json:"panels"`
	Templating struct {
		List []struct {
			Name       string     `json:"name"`
			Datasource datasource `json:"datasource"`
			Query      struct {
				Query string `json:"query"`
			} `json:"query"`
		} `json:"list"`
	} `json:"templating"`
}

type datasource struct {
	Type string `json:"type"`
	UID  string `json:"uid"`
}

type panel struct {
	ID         int        `json:"id"`
	Type       string     `json:"type"`
	Title      string     `json:"title"`
	Datasource datasource `json:"datasource"`
	GridPos    struct{ H, W, X, Y int }
	Panels     []panel `json:"panels"`
	Targets    []struct {
		RefID      string     `json:"refId"`
		Expr       string     `json:"expr"`
		Datasource datasource `json:"datasource"`
	} `json:"targets"`
}

func readDashboard(t *testing.T) dashboard {
	t.Helper()
	data, err := os.ReadFile(dashboardFile)
	if err != nil {
		t.Fatal(err)
	}
	if strings.Contains(string(data), "${DS_") || strings.Contains(string(data), "__inputs") {
		t.Fatalf("%s has import placeholders; file provisioning needs the fixed datasource uid", dashboardFile)
	}
	var d dashboard
	if err := json.Unmarshal(data, &d); err != nil {
		t.Fatalf("%s: %v", dashboardFile, err)
	}
	return d
}

// allPanels flattens rows, collapsed rows included.
func allPanels(ps []panel) []panel {
	var out []panel
	for _, p := range ps {
		out = append(out, p)
		out = append(out, allPanels(p.Panels)...)
	}
	return out
}

// The dashboard must load by file provisioning alone: every panel and the
// policy variable use the provisioned datasource uid, panel ids are unique,
// and there is a row per concern.
func TestDashboardIsProvisionable(t *testing.T) {
	t.Parallel()
	d := readDashboard(t)
	ds, err := os.ReadFile(datasourceFile)
	if err != nil {
		t.Fatal(err)
	}
	m := regexp.MustCompile(`(?m)^\s+uid:\s*(\S+)\s*$`).FindSubmatch(ds)
	if m == nil {
		t.Fatalf("%s names no datasource uid", datasourceFile)
	}
	uid := string(m[1])
	if d.UID == "" {
		t.Error("the dashboard has no uid")
	}
	if len(d.Templating.List) != 1 || d.Templating.List[0].Name != "policy" ||
		!strings.HasPrefix(d.Templating.List[0].Query.Query, "label_values(") || d.Templating.List[0].Datasource.UID != uid {
		t.Errorf("want one variable, policy, from label_values on datasource %s: %+v", uid, d.Templating.List)
	}
	ids := map[int]string{}
	var rows []string
	for _, p := range allPanels(d.Panels) {
		if prev, ok := ids[p.ID]; ok {
			t.Errorf("panels %q and %q share id %d", prev, p.Title, p.ID)
		}
		ids[p.ID] = p.Title
		if p.GridPos.W < 1 || p.GridPos.X+p.GridPos.W > 24 {
			t.Errorf("panel %q is outside the 24-column grid: %+v", p.Title, p.GridPos)
		}
		if p.Type == "row" {
			rows = append(rows, p.Title)
			continue
		}
		if p.Datasource.UID != uid || len(p.Targets) == 0 {
			t.Errorf("panel %q: datasource %+v with %d queries, want uid %s", p.Title, p.Datasource, len(p.Targets), uid)
		}
		for _, tg := range p.Targets {
			if tg.Datasource.UID != uid || tg.Expr == "" {
				t.Errorf("panel %q query %s: datasource %+v expr %q", p.Title, tg.RefID, tg.Datasource, tg.Expr)
			}
		}
	}
	for _, concern := range []string{"drift", "churn", "coverage", "Returns", "Backlog", "Choosing"} {
		if !slices.ContainsFunc(rows, func(r string) bool { return strings.Contains(r, concern) }) {
			t.Errorf("no row for %s among %q", concern, rows)
		}
	}
}

func TestPrometheusConfigPassesPromtool(t *testing.T) {
	t.Parallel()
	out, err := exec.Command(promtool(t), "check", "config", prometheusConfig).CombinedOutput()
	if err != nil {
		t.Fatalf("promtool check config %s: %v\n%s", prometheusConfig, err, out)
	}
}

// grafanaVariables stands in for what Grafana substitutes before a query
// reaches Prometheus, sized for a 1 s scrape interval.
func grafanaVariables(policy string) *strings.Replacer {
	return strings.NewReplacer(
		"$__rate_interval", "10s",
		"$__interval", "1s",
		"$__range", "1m",
		"$policy", regexp.QuoteMeta(policy),
	)
}

// prometheusServer is a real Prometheus on loopback.
type prometheusServer struct {
	URL string
}

// startPrometheus runs Prometheus with its own storage, scraping the given
// jobs every second, and kills it when the test ends.
func startPrometheus(t *testing.T, jobs map[string]string) *prometheusServer {
	t.Helper()
	bin, err := exec.LookPath("prometheus")
	if err != nil {
		t.Fatalf("prometheus not found (Debian package prometheus; scripts/setup-test-machine.sh installs it): %v", err)
	}
	dir := t.TempDir()
	var cfg strings.Builder
	cfg.WriteString("global:\n  scrape_interval: 1s\n  scrape_timeout: 1s\n  evaluation_interval: 1s\nscrape_configs:\n")
	for job, target := range jobs {
		fmt.Fprintf(&cfg, "  - job_name: %s\n    static_configs:\n      - targets: [%q]\n", job, target)
	}
	cfgPath := filepath.Join(dir, "prometheus.yml")
	if err := os.WriteFile(cfgPath, []byte(cfg.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	if out, err := exec.Command(promtool(t), "check", "config", cfgPath).CombinedOutput(); err != nil {
		t.Fatalf("test config: %v\n%s", err, out)
	}
	addr := freeLoopbackPort(t)
	cmd := exec.Command(bin, "--config.file="+cfgPath, "--storage.tsdb.path="+filepath.Join(dir, "data"),
		"--web.listen-address="+addr, "--log.level=warn")
	logs := &lockedBuffer{}
	cmd.Stdout, cmd.Stderr = logs, logs
	if err := cmd.Start(); err != nil {
		t.Fatalf("start prometheus: %v", err)
	}
	exited := make(chan struct{})
	go func() {
		_ = cmd.Wait()
		close(exited)
	}()
	t.Cleanup(func() {
		_ = cmd.Process.Kill()
		<-exited
		if t.Failed() {
			t.Logf("prometheus log:\n%s", logs)
		}
	})
	p := &prometheusServer{URL: "http://" + addr}
	waitFor(t, patience, "prometheus to be ready", func() bool {
		select {
		case <-exited:
			t.Fatalf("prometheus exited:\n%s", logs)
		default:
		}
		resp, err := http.Get(p.URL + "/-/ready")
		if err != nil {
			return false
		}
		resp.Body.Close()
		return resp.StatusCode == http.StatusOK
	})
	return p
}

type promResult struct {
	Metric map[string]string `json:"metric"`
	Value  []any             `json:"value"`
}

// query runs an instant query through the HTTP API.
func (p *prometheusServer) query(t *testing.T, expr string) []promResult {
	t.Helper()
	resp, err := http.Get(p.URL + "/api/v1/query?query=" + url.QueryEscape(expr))
	if err != nil {
		t.Fatalf("query %s: %v", expr, err)
	}
	defer resp.Body.Close()
	var body struct {
		Status    string `json:"status"`
		Error     string `json:"error"`
		ErrorType string `json:"errorType"`
		Data      struct {
			ResultType string       `json:"resultType"`
			Result     []promResult `json:"result"`
		} `json:"data"`
	}
	if err := json.NewDecoder(resp.Body).Decode(&body); err != nil {
		t.Fatalf("query %s: decode: %v", expr, err)
	}
	if body.Status != "success" {
		t.Fatalf("query %s: %s: %s", expr, body.ErrorType, body.Error)
	}
	if body.Data.ResultType != "vector" {
		t.Fatalf("query %s: result type %s, want vector", expr, body.Data.ResultType)
	}
	return body.Data.Result
}

// labelValues answers label_values(metric, label) as Grafana asks it.
func (p *prometheusServer) labelValues(t *testing.T, metric, label string) []string {
	t.Helper()
	resp, err := http.Get(p.URL + "/api/v1/label/" + url.PathEscape(label) + "/values?match[]=" + url.QueryEscape(metric))
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	var body struct {
		Status string   `json:"status"`
		Data   []string `json:"data"`
	}
	if err := json.NewDecoder(resp.Body).Decode(&body); err != nil || body.Status != "success" {
		t.Fatalf("label values of %s on %s: %v %+v", label, metric, err, body)
	}
	return body.Data
}

// Every panel query of the dashboard must return data from a real
// Prometheus scraping a running qtally, an API process and a worker, fed
// with episodes and choices: a misspelled metric or label gives an empty
// answer, not an error, so emptiness fails the test.
func TestDashboardQueriesReturnData(t *testing.T) {
	t.Parallel()
	d := readDashboard(t)
	db := pgtest.NewDatabase(t)
	apiProc := startService(t, db, "serve", "--no-worker")
	worker := startService(t, db, "worker")
	policy := "collections"
	apiProc.call("PUT", "/v1/policies/"+policy, map[string]any{"actions": []string{"call", "email", "wait"}, "epsilon": 0.5}, 201)
	rng := rand.New(rand.NewPCG(11, 12))
	feedLearningWork(t, apiProc, policy, rng, 0)
	apiProc.waitTrained(policy, 20)

	prom := startPrometheus(t, map[string]string{
		"qtally-api":    strings.TrimPrefix(apiProc.URL, "http://"),
		"qtally-worker": strings.TrimPrefix(worker.URL, "http://"),
	})
	// Keep the service busy while Prometheus takes enough samples for
	// rate() over the substituted $__rate_interval.
	round := 1
	waitFor(t, patience, "8 scrapes of both targets", func() bool {
		feedLearningWork(t, apiProc, policy, rng, round)
		round++
		time.Sleep(500 * time.Millisecond)
		counts := prom.query(t, `count_over_time(up[1m]) >= 8 and up == 1`)
		return len(counts) == 2
	})
	t.Logf("fed %d rounds of episodes and choices", round)

	v := d.Templating.List[0].Query.Query
	m := regexp.MustCompile(`^label_values\(\s*([a-zA-Z_:][a-zA-Z0-9_:]*)\s*,\s*([a-zA-Z_][a-zA-Z0-9_]*)\s*\)$`).FindStringSubmatch(v)
	if m == nil {
		t.Fatalf("variable query %q is not label_values(metric, label)", v)
	}
	if values := prom.labelValues(t, m[1], m[2]); !slices.Contains(values, policy) {
		t.Errorf("variable query %s offers %q, not %q", v, values, policy)
	}

	vars := grafanaVariables(policy)
	queries := 0
	for _, p := range allPanels(d.Panels) {
		for _, tg := range p.Targets {
			expr := vars.Replace(tg.Expr)
			if strings.Contains(expr, "$") {
				t.Errorf("panel %q query %s: unsubstituted variable in %s", p.Title, tg.RefID, expr)
				continue
			}
			queries++
			if res := prom.query(t, expr); len(res) == 0 {
				t.Errorf("panel %q query %s returns no series: %s", p.Title, tg.RefID, expr)
			}
		}
	}
	if queries == 0 {
		t.Fatal("the dashboard has no queries")
	}
	t.Logf("ran %d panel queries", queries)
}
