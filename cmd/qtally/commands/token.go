package commands

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net/netip"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/urfave/cli/v3"

	"github.com/qtally/qtally/api"
	"github.com/qtally/qtally/internal/access"
	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/training"
)

const (
	flagNoAuth          = "no-auth"
	flagTokenPepper     = "token-pepper"
	flagTokenPepperFile = "token-pepper-file"
	flagTokenRate       = "token-rate"
	flagTokenBurst      = "token-burst"
	flagTokenRefresh    = "token-refresh"
	flagSignInAttempts  = "sign-in-attempts"
	flagTrustedProxy    = "trusted-proxy"
)

// pageSessionLife is how long a status page sign-in lasts.
const pageSessionLife = 12 * time.Hour

// authConfig says whether and how the API checks tokens.
type authConfig struct {
	Off     bool
	Pepper  string
	Refresh time.Duration
}

// pepperFlags read the server-side key of the stored token digests, which
// every process and token command must share. It is a secret: it comes
// from the environment or a file, and a command-line value is refused.
func pepperFlags(env flagEnv) []cli.Flag {
	return []cli.Flag{
		&cli.StringFlag{Name: flagTokenPepper, Usage: "key of the stored token digests, from the environment only (a command-line value is refused); the same for every process and token command",
			Sources: env("QTALLY_TOKEN_PEPPER")},
		&cli.StringFlag{Name: flagTokenPepperFile, Usage: "file holding the token pepper, instead of QTALLY_TOKEN_PEPPER",
			Sources: env("QTALLY_TOKEN_PEPPER_FILE")},
	}
}

// authFlags configure token checking of an API process.
func authFlags(env flagEnv) []cli.Flag {
	return append(pepperFlags(env),
		&cli.BoolFlag{Name: flagNoAuth, Usage: "serve without tokens: any client may do anything (local development only; loopback listen addresses only)", Sources: env("QTALLY_NO_AUTH")},
		&cli.FloatFlag{Name: flagTokenRate, Value: 10000, Usage: "requests per second a token may make unless it was created with its own rate; 0: no limit", Sources: env("QTALLY_TOKEN_RATE")},
		&cli.IntFlag{Name: flagTokenBurst, Value: 20000, Usage: "requests a token may make at once above its rate", Sources: env("QTALLY_TOKEN_BURST")},
		&cli.DurationFlag{Name: flagTokenRefresh, Value: 5 * time.Second, Usage: "how often tokens are re-read; a revoked token stops working within this time even if its change notification is lost", Sources: env("QTALLY_TOKEN_REFRESH")},
		&cli.IntFlag{Name: flagSignInAttempts, Value: 10, Usage: "status page sign-ins one client address may try per minute (429 above)", Sources: env("QTALLY_SIGN_IN_ATTEMPTS")},
		&cli.StringSliceFlag{Name: flagTrustedProxy, Usage: "address or CIDR range of a TLS-terminating proxy in front of qtally (repeat or separate with commas): requests from it take the client address from X-Forwarded-For, and page cookies get the Secure attribute", Sources: env("QTALLY_TRUSTED_PROXIES")},
	)
}

// readAuthConfig reads the API's token settings into cfg and reports
// every problem with them at once.
func readAuthConfig(cmd *cli.Command, cfg *serviceConfig) error {
	a := &cfg.API
	a.Auth = authConfig{Off: cmd.Bool(flagNoAuth), Refresh: cmd.Duration(flagTokenRefresh)}
	a.HTTP.TokenRate = api.RateConfig{PerSecond: cmd.Float(flagTokenRate), Burst: cmd.Int(flagTokenBurst)}
	a.HTTP.SignInAttemptsPerMinute = cmd.Int(flagSignInAttempts)
	var p problems
	p.positive(flagTokenRefresh, a.Auth.Refresh)
	if a.HTTP.TokenRate.PerSecond < 0 || a.HTTP.TokenRate.Burst < 0 {
		p.add("--%s and --%s must not be negative", flagTokenRate, flagTokenBurst)
	}
	p.atLeast(flagSignInAttempts, int64(a.HTTP.SignInAttemptsPerMinute), 1)
	for _, s := range cmd.StringSlice(flagTrustedProxy) {
		r, err := parseAddressRange(strings.TrimSpace(s))
		if err != nil {
			p.add("--%s: %w", flagTrustedProxy, err)
			continue
		}
		a.HTTP.TrustedProxies = append(a.HTTP.TrustedProxies, r)
	}
	if a.Auth.Off {
		if err := requireLoopback(cfg.Process.Listen); err != nil {
			p = append(p, err)
		}
	} else if pepper, err := readPepper(cmd); err != nil {
		p = append(p, err)
	} else {
		a.Auth.Pepper = pepper
	}
	return errors.Join(p...)
}

// parseAddressRange reads an address (a range of one) or a CIDR range.
func parseAddressRange(s string) (netip.Prefix, error) {
	if a, err := netip.ParseAddr(s); err == nil {
		return netip.PrefixFrom(a.Unmap(), a.Unmap().BitLen()), nil
	}
	p, err := netip.ParsePrefix(s)
	if err != nil {
		return p, fmt.Errorf("%q is neither an address nor a CIDR range", s)
	}
	return p.Masked(), nil
}

// startKeyring loads the tokens an API process checks requests against and
// keeps them current: at once on a change notification, and every
// cfg.Refresh in case one is lost. It returns nil when auth is off.
// It returns the keyring and the notification that reloads it.
func startKeyring(ctx context.Context, cfg authConfig, db *storage.DB, loops *backgroundLoops,
	logger *slog.Logger, stdout io.Writer) (*access.Keyring, map[string]storage.Subscription) {
	if cfg.Off {
		fmt.Fprintln(stdout, "qtally: authentication is OFF (--no-auth): any client may read and change every policy")
		logger.Warn("authentication is off; every request is let through")
		return nil, nil
	}
	if len(cfg.Pepper) < 32 {
		logger.Warn("the token pepper is shorter than 32 characters; a long random one (openssl rand -hex 32) resists guessing from a copy of the database")
	}
	keyring := access.NewKeyring(db, cfg.Pepper)
	if err := keyring.Reload(ctx); err != nil {
		logger.Warn("reading tokens", "error", err)
	} else if keyring.Len() == 0 {
		logger.Warn("no active tokens: every API request will be refused until one is created with qtally token create")
	}
	reload := func(ctx context.Context) {
		if err := keyring.Reload(ctx); err != nil {
			logger.Warn("reloading tokens", "error", err)
		}
	}
	loops.Go("token refresh", func(ctx context.Context) error {
		return every(ctx, cfg.Refresh, func() { reload(ctx) })
	})
	return keyring, map[string]storage.Subscription{
		storage.ChannelTokens: {Notify: func(int32) { reload(ctx) }, CatchUp: func() { reload(ctx) }},
	}
}

// tokenCommand creates, lists and revokes API tokens.
func tokenCommand(env flagEnv, stdout io.Writer) *cli.Command {
	withDB := func(ctx context.Context, cmd *cli.Command, fn func(*storage.DB) error) error {
		url := cmd.String(flagDatabaseURL)
		if _, err := storage.Migrate(ctx, url); err != nil {
			return err
		}
		db, err := storage.Open(ctx, url, 2, training.DefaultLimits())
		if err != nil {
			return err
		}
		defer db.Close()
		return fn(db)
	}
	return &cli.Command{
		Name:  "token",
		Usage: "create, list and revoke API tokens",
		Commands: []*cli.Command{
			{
				Name:  "create",
				Usage: "create a token and print its secret, which is shown this once only",
				Flags: append([]cli.Flag{databaseFlag(env, true)}, append(pepperFlags(env),
					&cli.StringFlag{Name: "label", Usage: "what the token is for", Required: true},
					&cli.StringSliceFlag{Name: "scope", Usage: "what it may do: ingest, choose, admin (repeat or separate with commas)", Required: true},
					&cli.StringSliceFlag{Name: "policy", Usage: "limit it to these policies (repeat or separate with commas); all when omitted"},
					&cli.FloatFlag{Name: "rate", Usage: "its own requests per second instead of the server's --token-rate"},
					&cli.IntFlag{Name: "burst", Usage: "its own burst, with --rate"},
				)...),
				Action: func(ctx context.Context, cmd *cli.Command) error {
					spec := access.TokenSpec{Label: cmd.String("label"), Policies: cmd.StringSlice("policy"),
						RatePerSecond: cmd.Float("rate"), Burst: cmd.Int("burst")}
					for _, s := range cmd.StringSlice("scope") {
						spec.Scopes = append(spec.Scopes, access.Scope(strings.TrimSpace(s)))
					}
					if spec.RatePerSecond > 0 && spec.Burst == 0 {
						spec.Burst = max(1, int(spec.RatePerSecond))
					}
					if err := spec.Validate(); err != nil {
						return err
					}
					pepper, err := readPepper(cmd)
					if err != nil {
						return err
					}
					random := access.NewSecretPart()
					digest := access.NewTokenHasher(pepper).Digest(random)
					return withDB(ctx, cmd, func(db *storage.DB) error {
						tok, err := db.CreateToken(ctx, spec, digest)
						if err != nil {
							return err
						}
						fmt.Fprintf(stdout, "token %d created: %s\n", tok.ID, describeToken(tok))
						fmt.Fprintf(stdout, "secret: %s\n", access.FormatSecret(tok.ID, random))
						fmt.Fprintln(stdout, "The secret is shown only now; qtally keeps only a digest of it. Send it as: Authorization: Bearer <secret>")
						return nil
					})
				},
			},
			{
				Name:  "list",
				Usage: "list every token (never their secrets)",
				Flags: []cli.Flag{databaseFlag(env, true)},
				Action: func(ctx context.Context, cmd *cli.Command) error {
					return withDB(ctx, cmd, func(db *storage.DB) error {
						tokens, err := db.ListTokens(ctx)
						if err != nil {
							return err
						}
						w := tabwriter.NewWriter(stdout, 0, 0, 2, ' ', 0)
						fmt.Fprintln(w, "ID\tLABEL\tCREATED\tSTATE\tACCESS")
						for _, t := range tokens {
							state := "active"
							if t.RevokedAt != nil {
								state = "revoked " + t.RevokedAt.UTC().Format(time.RFC3339)
							}
							fmt.Fprintf(w, "%d\t%s\t%s\t%s\t%s\n", t.ID, strconv.Quote(t.Label), t.CreatedAt.UTC().Format(time.RFC3339), state, describeToken(t))
						}
						return w.Flush()
					})
				},
			},
			{
				Name:      "revoke",
				Usage:     "revoke a token by id; API processes refuse it within --token-refresh (at once when they get the change notification)",
				ArgsUsage: "<token id>",
				Flags:     []cli.Flag{databaseFlag(env, true)},
				Action: func(ctx context.Context, cmd *cli.Command) error {
					if cmd.Args().Len() != 1 {
						return fmt.Errorf("name one token id to revoke (see qtally token list)")
					}
					id, err := strconv.ParseInt(cmd.Args().First(), 10, 64)
					if err != nil || id < 1 {
						return fmt.Errorf("%q is not a token id (see qtally token list)", cmd.Args().First())
					}
					return withDB(ctx, cmd, func(db *storage.DB) error {
						at, err := db.RevokeToken(ctx, id)
						if err != nil {
							return err
						}
						fmt.Fprintf(stdout, "token %d revoked at %s\n", id, at.UTC().Format(time.RFC3339))
						return nil
					})
				},
			},
		},
	}
}

func describeToken(t access.Token) string {
	scopes := make([]string, len(t.Scopes))
	for i, s := range t.Scopes {
		scopes[i] = string(s)
	}
	policies := "all policies"
	if len(t.Policies) > 0 {
		policies = "policies " + strings.Join(t.Policies, ",")
	}
	rate := "server rate"
	if t.RatePerSecond > 0 {
		rate = fmt.Sprintf("%g/s burst %d", t.RatePerSecond, t.Burst)
	}
	return fmt.Sprintf("scopes %s; %s; %s", strings.Join(scopes, ","), policies, rate)
}
