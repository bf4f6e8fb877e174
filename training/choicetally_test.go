package training_test

import (
	"context"
	"errors"
	"testing"

	"github.com/qtally/qtally/training"
)

// failingRows serves a policy whose rows cannot be read, as when the
// database goes away during a first load.
type failingRows struct{ staticSource }

func (failingRows) QRowsSince(context.Context, int32, int64, func(training.QRow)) error {
	return errors.New("the database went away")
}

type countsSink struct{ counts []training.ChoiceCount }

func (s *countsSink) AddChoiceCounts(_ context.Context, counts []training.ChoiceCount) error {
	s.counts = append(s.counts, counts...)
	return nil
}

// A table whose first load failed (or has not finished) is already known
// to the copy; flushing the choice counts meanwhile must pass over it, not
// fail on it.
func TestChoiceFlushPassesOverATableStillLoading(t *testing.T) {
	p := training.Policy{ID: 1, Name: "renewals", Settings: training.DefaultSettings()}
	p.Actions = []string{"email", "wait"}
	r := training.NewReplica(failingRows{staticSource{p: p}})
	if _, err := r.Choose(context.Background(), "renewals", training.ChooseRequest{State: "s", Mode: training.Explore}); err == nil {
		t.Fatal("choose answered from a copy that could not load")
	}
	var sink countsSink
	if err := r.FlushChoices(context.Background(), &sink); err != nil || len(sink.counts) != 0 {
		t.Fatalf("flush: %v, %d counts; want none", err, len(sink.counts))
	}
}
