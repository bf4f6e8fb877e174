package training

import (
	"context"
	"strings"
	"testing"
)

// A worker whose settings cannot work stops at once with every problem
// named, before it asks for any work: with a zero poll interval an idle
// worker would otherwise ask again and again without pause.
func TestWorkerRefusesSettingsThatWouldSpin(t *testing.T) {
	w := &Worker{Store: nil, PollInterval: 0, Batch: BatchLimits{Episodes: 0, Steps: -1}, BatchTimeout: 0}
	err := w.Run(context.Background())
	if err == nil {
		t.Fatal("a worker with a zero poll interval ran")
	}
	for _, want := range []string{"poll interval must be positive", "at least one episode", "batch timeout must be positive"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("error %q does not say %q", err, want)
		}
	}
}
