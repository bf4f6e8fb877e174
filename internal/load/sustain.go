package load

import (
	"context"
	"fmt"
	"time"
)

// SustainOptions shape the sustained-loop scenario.
type SustainOptions struct {
	Mixed MixedOptions
	// Trials is how many rates are tried, each for the config's Duration.
	Trials int
	// Drain bounds the wait for the backlog to empty between trials.
	Drain time.Duration
}

// SustainTrial is one rate tried.
type SustainTrial struct {
	OfferedPerSec   float64       `json:"episodes_offered_per_s"`
	EpisodesPerSec  float64       `json:"episodes_per_s"`
	ChoosesPerSec   float64       `json:"chooses_per_s"`
	Errors          int64         `json:"errors"`
	Skipped         int64         `json:"episodes_skipped"`
	BacklogSlopePer float64       `json:"backlog_slope_per_s"`
	BacklogMax      int64         `json:"backlog_max"`
	ArrivalProbes   int           `json:"arrival_probes"`
	ArrivalUnserved int64         `json:"arrival_unserved"`
	ArrivalP50      time.Duration `json:"arrival_to_served_p50"`
	ArrivalP99      time.Duration `json:"arrival_to_served_p99"`
	ArrivalMax      time.Duration `json:"arrival_to_served_max"`
	// Flat: the clients kept to the offered rate (at most 1% of starts
	// skipped), nothing failed, and the backlog's trend stayed below 2% of
	// the posting rate.
	Flat bool `json:"flat"`
}

// SustainReport is the highest rate at which the whole loop kept up.
type SustainReport struct {
	StepsPerEpisode   int     `json:"steps_per_episode"`
	ChoosesPerEpisode float64 `json:"chooses_per_episode"`
	// KeepEpisodes: qtally kept the episodes (a recorded choose and a
	// reward addition every step, an end), rather than clients posting
	// them finished in batches.
	KeepEpisodes bool `json:"keep_episodes,omitempty"`
	// RequestsPerEpisode is what one episode costs the API in requests,
	// posts counted as their share of a batch.
	RequestsPerEpisode float64 `json:"requests_per_episode"`
	TrialSec           float64 `json:"trial_s"`
	// Best is the index in Trials of the highest flat rate; -1: none.
	Best   int            `json:"best"`
	Trials []SustainTrial `json:"trials"`
}

// flatShare is the backlog trend, as a share of the posting rate, below
// which a backlog counts as flat; skipShare is the share of the offered
// starts the clients may have had to skip. (The posted rate is not
// compared with the offered one: episodes under way when a run ends are
// not posted, which in a short run is a visible share.)
const (
	flatShare = 0.02
	skipShare = 0.01
)

// Sustain runs the mixed scenario (clients choose at every
// Mixed.ChooseEvery-th step and post finished episodes in batches) at a
// series of rates, each for cfg.Duration, and finds the highest rate at
// which the backlog stays flat: from cfg.Rate it doubles while the loop
// keeps up (halves while it does not), then bisects between the highest
// flat and the lowest rate that was not. Between trials it waits for the
// backlog to empty. Every trial measures arrival to served. A worker must
// be running.
func Sustain(ctx context.Context, cfg Config, opt SustainOptions) (SustainReport, error) {
	if cfg.Rate < 1 || opt.Trials < 1 {
		return SustainReport{}, fmt.Errorf("load: sustain needs a starting rate and at least one trial")
	}
	c, err := prepare(ctx, cfg)
	if err != nil {
		return SustainReport{}, err
	}
	obs := opt.Mixed.Observer
	if obs == nil {
		obs = statusObserver{c}
	}
	opt.Mixed.ProbeArrival = true
	chooses := float64((cfg.StepsPerEpisode + opt.Mixed.ChooseEvery - 1) / opt.Mixed.ChooseEvery)
	rep := SustainReport{StepsPerEpisode: cfg.StepsPerEpisode, TrialSec: cfg.Duration.Seconds(), Best: -1,
		ChoosesPerEpisode: chooses, KeepEpisodes: opt.Mixed.KeepEpisodes, RequestsPerEpisode: chooses + 1/float64(cfg.EpisodesPerPost)}
	if opt.Mixed.KeepEpisodes {
		// A recorded choose and a reward every step, and the end.
		rep.RequestsPerEpisode = 2*float64(cfg.StepsPerEpisode) + 1
	}
	lo, hi := 0, 0 // highest flat rate, lowest rate that was not (0: none yet)
	rate := cfg.Rate
	for range opt.Trials {
		if err := waitDrained(ctx, obs, cfg.Policy, opt.Drain); err != nil {
			return rep, err
		}
		run := cfg
		run.Rate = rate
		m, err := Mixed(ctx, run, opt.Mixed)
		if err != nil {
			return rep, err
		}
		tr := SustainTrial{OfferedPerSec: m.OfferedPerSec, EpisodesPerSec: m.EpisodesPerSec, ChoosesPerSec: m.ChoosesPerSec,
			Errors: m.Errors, Skipped: m.Skipped, BacklogSlopePer: m.BacklogSlopePer, BacklogMax: m.BacklogMax,
			ArrivalProbes: len(m.ArrivalToServed), ArrivalUnserved: m.ArrivalUnserved,
			ArrivalP50: m.ArrivalP50, ArrivalP99: m.ArrivalP99, ArrivalMax: m.ArrivalMax}
		tr.Flat = m.Errors == 0 && float64(m.Skipped) <= skipShare*m.OfferedPerSec*m.DurationSec &&
			len(m.Backlog) > 1 && m.BacklogSlopePer < flatShare*m.EpisodesPerSec
		rep.Trials = append(rep.Trials, tr)
		if tr.Flat {
			lo = rate
			rep.Best = len(rep.Trials) - 1
		} else {
			hi = rate
		}
		switch {
		case hi == 0:
			rate *= 2
		case lo == 0:
			rate /= 2
		default:
			rate = (lo + hi) / 2
		}
		if rate < 1 || rate == lo || rate == hi {
			break
		}
	}
	return rep, nil
}

// waitDrained waits until the policy has no untrained episodes.
func waitDrained(ctx context.Context, obs Observer, policy string, within time.Duration) error {
	deadline := time.Now().Add(within)
	for {
		n, err := obs.Backlog(ctx, policy)
		if err == nil && n == 0 {
			return nil
		}
		if time.Now().After(deadline) {
			return fmt.Errorf("load: %d episodes of %s still untrained after %v between trials (%v)", n, policy, within, err) //nolint:errorlint // err is often nil here: the backlog was read, just not 0
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(200 * time.Millisecond):
		}
	}
}
