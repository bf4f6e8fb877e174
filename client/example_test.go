package client_test

import (
	"context"
	"fmt"
	"log"

	"github.com/qtally/qtally/client"
)

// An application asks which onboarding message to send and records what
// followed; the recorder posts finished episodes in batches. Against
// `make dev` (http://127.0.0.1:8080, no token). The README has a complete
// program.
func Example() {
	ctx := context.Background()
	qt, err := client.New("http://127.0.0.1:8080", client.Options{})
	if err != nil {
		log.Fatal(err)
	}
	settings := client.DefaultSettings("show_tour", "send_tips", "do_nothing")
	settings.Gamma, settings.Epsilon = 0.95, 0.2
	// Create it, or replace the settings an earlier run left.
	_, _, err = qt.PutPolicy(ctx, "onboarding", settings, "")
	if client.ProblemOf(err) == client.ProblemPreconditionRequired {
		_, _, err = qt.PutPolicy(ctx, "onboarding", settings, client.IfMatchAny)
	}
	if err != nil {
		log.Fatal(err)
	}

	rec := qt.NewRecorder("onboarding", client.RecorderOptions{})
	ep := rec.Start("user-17-week-1") // the same id again is a duplicate, never learned twice
	choice, err := qt.Choose(ctx, "onboarding", client.ChooseRequest{State: "new_user|mobile", Mode: client.Explore})
	if err != nil {
		log.Fatal(err)
	}
	ep.Step(choice) // state, action, probability and allowed set, as chosen
	ep.Reward(1)    // the user came back
	if err := ep.End(ctx); err != nil {
		log.Fatal(err)
	}
	if err := rec.Close(ctx); err != nil { // posts what is left
		log.Fatal(err)
	}
	fmt.Println(rec.Stats().Accepted+rec.Stats().Duplicates, "episode posted")
}

// Evaluate judges the live table on the last 5000 episodes, off-policy,
// and reports the job's progress while it runs.
func ExampleClient_Evaluate() {
	qt, err := client.New("http://127.0.0.1:8080", client.Options{})
	if err != nil {
		log.Fatal(err)
	}
	res, err := qt.Evaluate(context.Background(), "payment-recovery-demo",
		client.EvaluationRequest{Window: client.EpisodeWindow{Last: 5000}},
		func(p client.Progress) { fmt.Printf("%s %d/%d\n", p.Phase, p.Done, p.Total) })
	if err != nil {
		log.Fatal(err)
	}
	fmt.Printf("greedy policy: %.3f (%.0f%% interval %.3f to %.3f), behaviour %.3f\n", res.Weighted.Estimate,
		100*res.Level, res.Weighted.Interval.Low, res.Weighted.Interval.High, res.BehaviourMeanReturn)
}
