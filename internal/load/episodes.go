package load

import (
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"strconv"

	"github.com/qtally/qtally/client"
)

// generator makes synthetic episodes over a fixed pool of state names.
type generator struct {
	rng     *rand.Rand
	states  []string
	actions []string
	steps   int
	run     string
	next    int
}

func newGenerator(cfg Config, run string) *generator {
	states := make([]string, cfg.States)
	for i := range states {
		states[i] = stateName(i)
	}
	return &generator{rng: rand.New(rand.NewPCG(cfg.Seed, uint64(len(run)))), states: states,
		actions: cfg.Actions, steps: cfg.StepsPerEpisode, run: run}
}

// stateName is the i-th state of generated traffic; scripts/bench/choose.lua
// builds the same names.
func stateName(i int) string {
	return fmt.Sprintf("tier=%d|day=%d|reason=%d", i%7, (i/7)%30, i/210)
}

func (g *generator) state() string { return g.states[g.rng.IntN(len(g.states))] }

func (g *generator) episode() client.Episode {
	g.next++
	ep := client.Episode{ID: g.run + "-" + strconv.Itoa(g.next), Steps: make([]client.Step, g.steps)}
	for i := range ep.Steps {
		ep.Steps[i] = client.Step{State: g.state(), Action: g.actions[g.rng.IntN(len(g.actions))],
			Reward: float64(g.rng.IntN(200)-50) / 10, Probability: 0.25}
	}
	return ep
}

// batch is n fresh episodes.
func (g *generator) batch(n int) []client.Episode {
	eps := make([]client.Episode, n)
	for i := range eps {
		eps[i] = g.episode()
	}
	return eps
}

// batchBody is one POST body of n fresh episodes.
func (g *generator) batchBody(n int) []byte {
	data, err := json.Marshal(map[string]any{"episodes": g.batch(n)})
	if err != nil {
		panic(err) // plain structs always marshal
	}
	return data
}
