package systemtest

import (
	"bytes"
	"io"
	"math"
	"net/http"
	"os/exec"
	"strings"
	"testing"

	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"
)

// parseMetrics is the tests' one reader of the /metrics text format.
func parseMetrics(t testing.TB, where string, body io.Reader) map[string]*dto.MetricFamily {
	t.Helper()
	parser := expfmt.NewTextParser(model.UTF8Validation)
	families, err := parser.TextToMetricFamilies(body)
	if err != nil {
		t.Fatalf("parse %s: %v", where, err)
	}
	return families
}

// metricSum adds up a counter, gauge or untyped metric, or a histogram's
// _sum or _count, over its labels on a process's /metrics (0 when absent).
func metricSum(t testing.TB, base, name string) float64 {
	t.Helper()
	resp, err := http.Get(base + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	families := parseMetrics(t, base+"/metrics", resp.Body)
	var sum float64
	if f, ok := families[name]; ok {
		for _, m := range f.GetMetric() {
			sum += m.GetCounter().GetValue() + m.GetGauge().GetValue() + m.GetUntyped().GetValue()
		}
	}
	// A histogram's _sum and _count are fields of its one family.
	for suffix, field := range map[string]func(*dto.Histogram) float64{
		"_sum":   (*dto.Histogram).GetSampleSum,
		"_count": func(h *dto.Histogram) float64 { return float64(h.GetSampleCount()) },
	} {
		if base, ok := strings.CutSuffix(name, suffix); ok {
			for _, m := range families[base].GetMetric() {
				sum += field(m.GetHistogram())
			}
		}
	}
	return sum
}

// scrape reads /metrics through the OpenAPI-checked client.
func (s *service) scrape() (string, map[string]*dto.MetricFamily) {
	s.t.Helper()
	r := s.send("GET", "/metrics", "", nil, false)
	if r.Status != 200 {
		s.t.Fatalf("GET /metrics: %d %s", r.Status, r.Body)
	}
	return string(r.Body), parseMetrics(s.t, "/metrics", bytes.NewReader(r.Body))
}

// sample finds the series of a family whose labels include want.
func sample(families map[string]*dto.MetricFamily, name string, want map[string]string) *dto.Metric {
	f := families[name]
	if f == nil {
		return nil
	}
	for _, m := range f.GetMetric() {
		labels := map[string]string{}
		for _, l := range m.GetLabel() {
			labels[l.GetName()] = l.GetValue()
		}
		match := true
		for k, v := range want {
			match = match && labels[k] == v
		}
		if match {
			return m
		}
	}
	return nil
}

// gaugeOf reads one gauge, or NaN when the series is missing.
func gaugeOf(families map[string]*dto.MetricFamily, name, policy string) float64 {
	m := sample(families, name, map[string]string{"policy": policy})
	if m == nil {
		return math.NaN()
	}
	return m.GetGauge().GetValue()
}

// promtool finds the Prometheus command-line tool the checks run.
func promtool(t testing.TB) string {
	t.Helper()
	path, err := exec.LookPath("promtool")
	if err != nil {
		t.Fatalf("promtool not found (Debian package prometheus; scripts/setup-test-machine.sh installs it): %v", err)
	}
	return path
}

// metric reads one unlabelled sample, or the sum over a metric's labels,
// from the process's /metrics.
func (p *process) metric(name string) float64 {
	p.t.Helper()
	return metricSum(p.t, p.URL, name)
}
