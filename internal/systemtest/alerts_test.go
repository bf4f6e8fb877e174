package systemtest

import (
	"os"
	"os/exec"
	"regexp"
	"slices"
	"strings"
	"testing"
)

const alertRules = "deploy/prometheus/alerts.yml"

// The alerting rules must load in Prometheus (promtool check rules) and
// behave as their unit tests say: alerts fire on the series that call for
// them, after their for: period, and stay silent on the others.
func TestAlertRulesPassPromtool(t *testing.T) {
	t.Parallel()
	tool := promtool(t)
	if out, err := exec.Command(tool, "check", "rules", alertRules).CombinedOutput(); err != nil {
		t.Fatalf("promtool check rules %s: %v\n%s", alertRules, err, out)
	}
	cmd := exec.Command(tool, "test", "rules", "alerts_test.yml")
	cmd.Dir = "deploy/prometheus"
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("promtool test rules deploy/prometheus/alerts_test.yml: %v\n%s", err, out)
	}
}

// alertRuleMetrics lists the qtally metric families the alerting rules
// query (a histogram's _bucket, _count and _sum series name its family).
func alertRuleMetrics(t testing.TB) []string {
	t.Helper()
	data, err := os.ReadFile(alertRules)
	if err != nil {
		t.Fatal(err)
	}
	var names []string
	for _, m := range regexp.MustCompile(`\bqtally_[a-z_]+`).FindAllString(string(data), -1) {
		for _, suffix := range []string{"_bucket", "_count", "_sum"} {
			m = strings.TrimSuffix(m, suffix)
		}
		if !slices.Contains(names, m) {
			names = append(names, m)
		}
	}
	if len(names) == 0 {
		t.Fatalf("%s names no qtally metric", alertRules)
	}
	return names
}
