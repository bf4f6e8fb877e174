// Package api is qtally's HTTP layer: it binds and validates requests,
// makes one call into the domain, and answers. It holds no SQL and no
// learning maths; it declares the narrow interfaces it needs.
package api

import (
	"context"
	"log/slog"
	"net"
	"net/http"
	"net/netip"
	"time"

	"github.com/labstack/echo/v4"
	"github.com/prometheus/client_golang/prometheus"

	"github.com/qtally/qtally/internal/metrics"
	"github.com/qtally/qtally/internal/views"
	"github.com/qtally/qtally/training"
)

// Policies creates, updates and reads policies.
type Policies interface {
	ChangePolicy(ctx context.Context, name string, change training.SettingsChange) (training.Policy, bool, error)
	PolicyStatus(ctx context.Context, name string) (views.PolicyStatus, error)
	ListPolicyStatus(ctx context.Context) ([]views.PolicyStatus, error)
}

// Eraser deletes stored data about people: one episode's record, or a
// policy with everything it owns.
type Eraser interface {
	EraseEpisode(ctx context.Context, policy, episodeID string) error
	DeletePolicy(ctx context.Context, name string) error
}

// SettingsHistory reads the recorded changes of a policy's settings.
type SettingsHistory interface {
	SettingsHistory(ctx context.Context, policy string, before int64, limit int) (training.SettingsHistoryPage, error)
}

// Episodes stores posted episodes.
type Episodes interface {
	Ingest(ctx context.Context, policy string, episodes []training.Episode) (views.IngestResult, error)
	// CheckEpisodes validates episodes against the policy as Ingest does,
	// storing nothing.
	CheckEpisodes(ctx context.Context, policy string, episodes []training.Episode) error
}

// States reads a policy's states: one state's estimates, or one page of
// the list of its states.
type States interface {
	State(ctx context.Context, policy, state string) (views.StateView, error)
	ListStates(ctx context.Context, policy string, q views.StateQuery) (views.StatePage, error)
}

// PolicyReports reads the status page's report of a policy.
type PolicyReports interface {
	PolicyReport(ctx context.Context, policy string, window time.Duration, top int) (views.PolicyReport, error)
}

// Chooser picks actions.
type Chooser interface {
	Choose(ctx context.Context, policy string, req training.ChooseRequest) (training.ChooseResult, error)
}

// RecordedChooser picks actions and records them in open episodes.
type RecordedChooser interface {
	ChooseRecorded(ctx context.Context, policy, episode string, step int, req training.ChooseRequest) (training.RecordedChoice, error)
}

// OpenEpisodes adds rewards to, ends and reads the episodes qtally keeps open.
type OpenEpisodes interface {
	AddReward(ctx context.Context, policy, episode string, add training.RewardAddition) (training.RewardResult, error)
	EndOpenEpisode(ctx context.Context, policy, episode string, req training.EndRequest) (training.EndResult, error)
	OpenEpisode(ctx context.Context, policy, episode string) (training.OpenEpisodeView, error)
	PolicyOpenEpisodes(ctx context.Context, policy string) (training.OpenEpisodeFigures, error)
}

// Readiness tells whether the service can do its work.
type Readiness interface {
	Ready(ctx context.Context) error
}

// Config holds the HTTP layer's limits.
type Config struct {
	// MaxBodyBytes bounds a request body; larger bodies get 413.
	MaxBodyBytes int64
	// MaxStateLength bounds a state name in choose requests.
	MaxStateLength int
	// MaxIDLength bounds an open episode's id (and a reward's key).
	MaxIDLength int
	// HistoryWindow is how much training history is kept: the status
	// page's charts reach back at most this far.
	HistoryWindow time.Duration
	// TokenRate limits each token's requests unless the token sets its own.
	TokenRate RateConfig
	// ProblemDocs is the address of the problem type documentation; each
	// of qtally's problem types is this address, "#" and its name.
	ProblemDocs string
	// SignInAttemptsPerMinute is how many sign-ins one client address may
	// try a minute, with as many at once.
	SignInAttemptsPerMinute int
	// TrustedProxies are the addresses of a TLS-terminating proxy in front
	// of the service: requests from them take the client address from
	// X-Forwarded-For, and page cookies get the Secure attribute.
	TrustedProxies []netip.Prefix
	// BulkTimeout replaces the server's read and write timeouts for
	// authenticated requests that carry episode batches or whole tables.
	BulkTimeout time.Duration
}

// Deps are what the server calls.
type Deps struct {
	Logger   *slog.Logger
	Policies Policies
	History  SettingsHistory
	Eraser   Eraser
	Episodes Episodes
	States   States
	Chooser  Chooser
	// Recorder and OpenEpisodes serve the episodes qtally keeps open.
	Recorder     RecordedChooser
	OpenEpisodes OpenEpisodes
	Reports      PolicyReports
	Ready        Readiness
	Metrics      *metrics.Metrics
	Gatherer     prometheus.Gatherer

	// Snapshots, Tables and Jobs serve snapshots, table rewrites and
	// background evaluations and replays.
	Snapshots Snapshots
	Tables    TableWriter
	Jobs      Jobs
	// Audit records admin actions and reads them back.
	Audit AuditLog
	// Auth verifies tokens and Sessions keeps page sign-ins; a nil Auth
	// turns authentication off.
	Auth     Authenticator
	Sessions PageSessions
}

// maxTrackedAddresses bounds the client addresses the sign-in limiter
// remembers.
const maxTrackedAddresses = 10_000

// fromTrustedProxy tells whether the request's peer is a configured proxy.
func (cfg Config) fromTrustedProxy(c echo.Context) bool {
	if len(cfg.TrustedProxies) == 0 {
		return false
	}
	ap, err := netip.ParseAddrPort(c.Request().RemoteAddr)
	if err != nil {
		return false
	}
	for _, p := range cfg.TrustedProxies {
		if p.Contains(ap.Addr().Unmap()) {
			return true
		}
	}
	return false
}

// clientAddress takes a request's client address from the connection, or,
// behind a configured proxy, from what the proxy appended to
// X-Forwarded-For; a header from anyone else is ignored.
func clientAddress(cfg Config) echo.IPExtractor {
	if len(cfg.TrustedProxies) == 0 {
		return echo.ExtractIPDirect()
	}
	opts := []echo.TrustOption{echo.TrustLoopback(false), echo.TrustLinkLocal(false), echo.TrustPrivateNet(false)}
	for _, p := range cfg.TrustedProxies {
		opts = append(opts, echo.TrustIPRange(&net.IPNet{IP: p.Addr().AsSlice(), Mask: net.CIDRMask(p.Bits(), p.Addr().BitLen())}))
	}
	return echo.ExtractIPFromXFFHeader(opts...)
}

// NewServer returns the HTTP handler of an API process.
func NewServer(cfg Config, d Deps) http.Handler {
	g := newGuard(d.Auth, d.Sessions, cfg.TokenRate)
	audit := auditedRoutes{}
	// The audit log records refusals too: it runs before names are authorised.
	e := newEcho(cfg, d, g.authenticate, audit.record(d.Audit, d.Logger), authorizeNamedPolicies)
	e.IPExtractor = clientAddress(cfg)
	addHealthRoutes(e, d)
	addAPIRoutes(e, cfg, d, g, audit)
	addStatusRoutes(e, cfg, d, g)
	return e
}

// NewHealthServer serves only health and metrics, for worker processes.
func NewHealthServer(cfg Config, d Deps) http.Handler {
	e := newEcho(cfg, d)
	addHealthRoutes(e, d)
	return e
}

// newEcho returns the echo server of a process: every request, matched
// route or not, goes through observe and then through every middleware
// of all, the first outermost.
func newEcho(cfg Config, d Deps, all ...echo.MiddlewareFunc) *echo.Echo {
	e := echo.New()
	e.HideBanner = true
	e.HidePort = true
	types := problemTypes{docs: cfg.ProblemDocs}
	e.HTTPErrorHandler = errorHandler(d.Logger, types)
	e.Pre(routeOnEscapedPath)
	// echo v4 applies its middleware anew for every request, to the
	// handler routing found (an allocation a middleware); this chain is
	// built once and ends in that handler, which the context holds. So it
	// must be the only middleware added with Use.
	chain := withMiddleware(func(c echo.Context) error { return c.Handler()(c) },
		append([]echo.MiddlewareFunc{observe(d.Metrics, d.Logger, types, e)}, all...)...)
	e.Use(func(echo.HandlerFunc) echo.HandlerFunc { return chain })
	return e
}

// routeOnEscapedPath makes echo route on the escaped path always, so that
// path parameters arrive escaped exactly once. By default echo routes on
// the decoded path unless the escaped one differs from its canonical form,
// and a state named "a%2Fb" would be decoded twice.
func routeOnEscapedPath(next echo.HandlerFunc) echo.HandlerFunc {
	return func(c echo.Context) error {
		u := c.Request().URL
		u.RawPath = u.EscapedPath()
		return next(c)
	}
}
