package demo

import (
	"math"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/client"
)

func TestDefaultConfigIsValid(t *testing.T) {
	if err := DefaultConfig().validate(); err != nil {
		t.Fatal(err)
	}
}

func TestConfigValidationRefusesNonsense(t *testing.T) {
	for name, change := range map[string]func(*Config){
		"no scheme":       func(c *Config) { c.BaseURL = "127.0.0.1:8080" },
		"other scheme":    func(c *Config) { c.BaseURL = "ftp://127.0.0.1" },
		"no policy":       func(c *Config) { c.Policy = "" },
		"negative rate":   func(c *Config) { c.Rate = -1 },
		"infinite rate":   func(c *Config) { c.Rate = math.Inf(1) },
		"no limit at all": func(c *Config) { c.Episodes, c.Duration = 0, 0 },
		"zero batch":      func(c *Config) { c.BatchSize = 0 },
		"zero workers":    func(c *Config) { c.Concurrency = 0 },
		"zero window":     func(c *Config) { c.Window = 0 },
		"zero settle":     func(c *Config) { c.SettleTimeout = 0 },
	} {
		cfg := DefaultConfig()
		change(&cfg)
		if err := cfg.validate(); err == nil {
			t.Errorf("%s: accepted", name)
		}
	}
	cfg := DefaultConfig()
	cfg.Episodes, cfg.Duration = 0, time.Minute
	if err := cfg.validate(); err != nil {
		t.Errorf("duration without a budget: %v", err)
	}
}

func TestReportFractionAndText(t *testing.T) {
	r := Report{Episodes: 30_000, Window: 1000, MeanReturn: 6.5, Optimal: 8, Learned: 7.5, Random: 0.5,
		Exploring: 6.25, BestFixed: 5.5, BestFixedAction: RetryCard,
		FirstDay: []FirstAction{{State: State{Reason: CardOutOfDate}, Learned: []Action{EmailReminder}, Optimal: []Action{TextReminder}, Shortfall: 0.031}}}
	if got := r.Fraction(); math.Abs(got-7.0/7.5) > 1e-15 {
		t.Errorf("fraction %v, want %v", got, 7.0/7.5)
	}
	if got := r.FractionFromBestFixed(); math.Abs(got-2.0/2.5) > 1e-15 {
		t.Errorf("fraction from the best fixed action %v, want %v", got, 2.0/2.5)
	}
	text := r.String()
	for _, want := range []string{"30000", "93.3% of the way", "card_out_of_date", "email_reminder / text_reminder  (0.031 less)",
		"exploring behaviour:       6.250", "best fixed action:         5.500 (always retry_card)", "best fixed -> optimal:     80.0% of the way"} {
		if !strings.Contains(text, want) {
			t.Errorf("report lacks %q:\n%s", want, text)
		}
	}
}

func TestWindowKeepsTheMostRecentReturns(t *testing.T) {
	w := newWindow(3)
	if !math.IsNaN(w.mean()) {
		t.Errorf("empty window mean %v, want NaN", w.mean())
	}
	w.add(1)
	w.add(2)
	if w.len() != 2 || w.mean() != 1.5 {
		t.Errorf("after 1, 2: len %d mean %v", w.len(), w.mean())
	}
	w.add(3)
	w.add(10)
	if w.len() != 3 || w.mean() != 5 {
		t.Errorf("after 1, 2, 3, 10: len %d mean %v, want 3 and 5", w.len(), w.mean())
	}
}

func TestQRowFollowsActionOrder(t *testing.T) {
	var answer client.StateView
	names := ActionNames()
	// The service may list actions in any order; the row must not care.
	for i := len(names) - 1; i >= 0; i-- {
		answer.Actions = append(answer.Actions, client.ActionValue{Action: names[i], Q: float64(i)})
	}
	row, err := qRow(answer)
	if err != nil {
		t.Fatal(err)
	}
	for a, q := range row {
		if q != float64(a) {
			t.Errorf("action %s has %v, want %v", Action(a), q, float64(a))
		}
	}
	answer.Actions = answer.Actions[1:]
	if _, err := qRow(answer); err == nil {
		t.Error("a missing action was accepted")
	}
}

// The service's exploration rate: max(epsilon_min, epsilon k / (k + N)),
// as the README states it for epsilon_decay_visits k.
func TestEpsilonForFollowsTheServicesRule(t *testing.T) {
	s := RecommendedSettings() // epsilon 1, floor 0.02, k 300
	for _, c := range []struct {
		visits int64
		want   float64
	}{{0, 1}, {300, 0.5}, {900, 0.25}, {1_000_000, 0.02}} {
		if got := s.epsilonFor(c.visits); math.Abs(got-c.want) > 1e-15 {
			t.Errorf("%d visits: epsilon %v, want %v", c.visits, got, c.want)
		}
	}
	s.EpsilonDecayVisits = 0
	if got := s.epsilonFor(1000); got != s.Epsilon {
		t.Errorf("without decay: %v, want %v", got, s.Epsilon)
	}
}
