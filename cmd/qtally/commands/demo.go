package commands

import (
	"context"
	"fmt"
	"io"

	"github.com/urfave/cli/v3"

	"github.com/qtally/qtally/internal/demo"
)

// demoFlags configure the simulated customers of the demo.
func demoFlags(env flagEnv) []cli.Flag {
	def := demo.DefaultConfig()
	return []cli.Flag{
		&cli.StringFlag{Name: "demo-policy", Value: def.Policy, Usage: "policy the demo creates and trains"},
		&cli.FloatFlag{Name: "demo-rate", Value: def.Rate, Usage: "simulated episodes started per second (0: as fast as they finish)"},
		&cli.IntFlag{Name: "demo-episodes", Value: def.Episodes, Usage: "simulated episodes in all (0: no limit, stop by --demo-duration)"},
		&cli.DurationFlag{Name: "demo-duration", Value: def.Duration, Usage: "longest the demo runs (0: no limit, stop by --demo-episodes)"},
		&cli.IntFlag{Name: "demo-concurrency", Value: def.Concurrency, Usage: "simulated customers in flight at once"},
		&cli.Uint64Flag{Name: "demo-seed", Value: def.Seed, Usage: "seed of the simulated customers"},
		&cli.BoolFlag{Name: "demo-keep-episodes", Usage: "let qtally keep each customer's episode open (choose records every decision, rewards are added as they happen, the episode is ended when the case closes) instead of posting finished episodes"},
		&cli.StringFlag{Name: "token", Usage: "API token for the demo client", Sources: env("QTALLY_TOKEN")},
	}
}

func demoConfig(cmd *cli.Command, baseURL string) demo.Config {
	cfg := demo.DefaultConfig()
	cfg.BaseURL, cfg.Token = baseURL, cmd.String("token")
	cfg.Policy, cfg.Rate = cmd.String("demo-policy"), cmd.Float("demo-rate")
	cfg.Episodes, cfg.Duration = cmd.Int("demo-episodes"), cmd.Duration("demo-duration")
	cfg.Concurrency, cfg.Seed = cmd.Int("demo-concurrency"), cmd.Uint64("demo-seed")
	cfg.KeepEpisodes = cmd.Bool("demo-keep-episodes")
	return cfg
}

// runDemo runs the simulated customers against baseURL and prints how
// close the learned policy came to the optimum.
func runDemo(ctx context.Context, cfg demo.Config, out io.Writer) error {
	fmt.Fprintf(out, "demo: simulated payment-recovery customers against %s, policy %q (the scenario's dynamics are invented)\n", cfg.BaseURL, cfg.Policy)
	report, err := demo.Run(ctx, cfg, out)
	if err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	fmt.Fprint(out, report.String())
	return nil
}

func demoCommand(env flagEnv, stdout io.Writer) *cli.Command {
	return &cli.Command{
		Name:  "demo",
		Usage: "run simulated payment-recovery customers against a running qtally and report how well it learned",
		Flags: append(demoFlags(env), apiURLFlag(env, demo.DefaultConfig().BaseURL, "base URL of the qtally to drive", "QTALLY_DEMO_URL")),
		Action: func(ctx context.Context, cmd *cli.Command) error {
			return runDemo(ctx, demoConfig(cmd, cmd.String(flagAPIURL)), stdout)
		},
	}
}
