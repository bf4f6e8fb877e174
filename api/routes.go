package api

import (
	"net/http"

	"github.com/labstack/echo/v4"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"github.com/qtally/qtally/internal/access"
	"github.com/qtally/qtally/internal/jobs"
)

// addHealthRoutes serves what every process serves, API or worker.
func addHealthRoutes(e *echo.Echo, d Deps) {
	r := routeAdder{e}
	r.GET("/livez", handleLive())
	r.GET("/readyz", handleReady(d.Ready))
	r.GET("/metrics", echo.WrapHandler(promhttp.HandlerFor(d.Gatherer, promhttp.HandlerOpts{})))
}

// addAPIRoutes serves the policy API. Every route needs a valid token (g
// checks that for all requests); each names the scope it needs on top.
func addAPIRoutes(e *echo.Echo, cfg Config, d Deps, g *guard, audit auditedRoutes) {
	r := routeAdder{e}
	r.GET("/v1/openapi.json", handleOpenAPI(cfg.ProblemDocs))

	// Every admin route is registered through audit.add, so that each of its
	// requests goes to the audit log (TestEveryRouteEnforcesAccess checks).
	admin, ingest, choose := g.requireScope(access.ScopeAdmin), g.requireScope(access.ScopeIngest), g.requireScope(access.ScopeChoose)
	bulk := bulkDeadline(cfg.BulkTimeout)
	audit.add(r.GET("/v1/policies", handleListPolicies(d.Policies), admin))
	audit.add(r.GET("/v1/audit", handleAuditLog(d.Audit), admin))
	// Applications read their policy's backlog and revision with the
	// scopes they have.
	audit.add(r.GET("/v1/policies/:policy", handleGetPolicy(d.Policies),
		g.requireScope(access.ScopeAdmin, access.ScopeChoose, access.ScopeIngest)))
	audit.add(r.PUT("/v1/policies/:policy", handlePutPolicy(d.Policies, cfg), admin))
	audit.add(r.PATCH("/v1/policies/:policy", handlePatchPolicy(d.Policies, cfg), admin))
	audit.add(r.DELETE("/v1/policies/:policy", handleDeletePolicy(d.Eraser), admin))
	audit.add(r.GET("/v1/policies/:policy/settings-history", handleSettingsHistory(d.History), admin))
	audit.add(r.DELETE("/v1/policies/:policy/episodes/:episode", handleEraseEpisode(d.Eraser), admin))
	r.POST("/v1/policies/:policy/episodes", handlePostEpisodes(d.Episodes, d.Metrics, cfg), ingest, bulk)
	r.POST("/v1/policies/:policy/choose", handleChoose(d.Chooser, d.Recorder, d.Metrics, cfg), choose)
	r.POST("/v1/policies/:policy/open-episodes/:episode/rewards", handleAddReward(d.OpenEpisodes, d.Metrics, cfg), ingest)
	r.POST("/v1/policies/:policy/open-episodes/:episode/end", handleEndEpisode(d.OpenEpisodes, d.Metrics, cfg), ingest)
	r.GET("/v1/policies/:policy/open-episodes/:episode", handleGetOpenEpisode(d.OpenEpisodes, cfg),
		g.requireScope(access.ScopeIngest, access.ScopeChoose))
	r.GET("/v1/policies/:policy/states", handleListStates(d.States), choose)
	r.GET("/v1/policies/:policy/states/:state", handleGetState(d.States, cfg), choose)

	audit.add(r.GET("/v1/policies/:policy/table", handleExportTable(d.Snapshots, false), admin, bulk))
	audit.add(r.PUT("/v1/policies/:policy/table", handleImportTable(d.Tables, cfg), admin, bulk))
	audit.add(r.GET("/v1/policies/:policy/diff", handleDiffTables(d.Snapshots), admin))
	audit.add(r.GET("/v1/policies/:policy/snapshots", handleListSnapshots(d.Snapshots), admin))
	audit.add(r.POST("/v1/policies/:policy/snapshots", handleCreateSnapshot(d.Snapshots, cfg), admin))
	audit.add(r.GET("/v1/policies/:policy/snapshots/:snapshot", handleGetSnapshot(d.Snapshots), admin))
	audit.add(r.DELETE("/v1/policies/:policy/snapshots/:snapshot", handleDeleteSnapshot(d.Snapshots), admin))
	audit.add(r.GET("/v1/policies/:policy/snapshots/:snapshot/table", handleExportTable(d.Snapshots, true), admin, bulk))
	audit.add(r.POST("/v1/policies/:policy/snapshots/:snapshot/restore", handleRestoreSnapshot(d.Tables), admin))
	audit.add(r.POST("/v1/policies/:policy/evaluations", handleQueueEvaluation(d.Jobs, cfg), admin))
	audit.add(r.GET("/v1/policies/:policy/evaluations", handleListJobs(d.Jobs, jobs.EvaluationKind), admin))
	audit.add(r.GET("/v1/policies/:policy/evaluations/:id", handleGetJob(d.Jobs, jobs.EvaluationKind), admin))
	audit.add(r.POST("/v1/policies/:policy/replays", handleQueueReplay(d.Jobs, cfg), admin))
	audit.add(r.GET("/v1/policies/:policy/replays", handleListJobs(d.Jobs, jobs.ReplayKind), admin))
	audit.add(r.GET("/v1/policies/:policy/replays/:id", handleGetJob(d.Jobs, jobs.ReplayKind), admin))
}

// addStatusRoutes serves the status pages for people; they show every
// policy's figures, so they need the admin scope.
func addStatusRoutes(e *echo.Echo, cfg Config, d Deps, g *guard) {
	r := routeAdder{e}
	admin := g.requireScope(access.ScopeAdmin)
	if g != nil {
		s := &signIn{auth: g.auth, sessions: g.sessions, attempts: newAddressLimiter(cfg.SignInAttemptsPerMinute, maxTrackedAddresses),
			trustedProxy: cfg.fromTrustedProxy}
		r.GET(signInPath, handleSignInPage())
		r.POST(signInPath, s.handleSignIn())
		r.POST(signOutPath, s.handleSignOut())
	}
	r.GET("/", handleOverview(d.Policies), admin)
	r.GET("/policies/:policy", handlePolicyPage(d.Reports, d.History, d.OpenEpisodes, cfg), admin)
	r.GET("/policies/:policy/states", handleStatesPage(d.States), admin)
}

// routeAdder adds routes to e with each route's middleware applied once,
// as the route is added: echo v4 applies a route's middleware anew for
// every request, an allocation for each.
type routeAdder struct{ e *echo.Echo }

func (r routeAdder) add(method, path string, h echo.HandlerFunc, mw []echo.MiddlewareFunc) *echo.Route {
	return r.e.Add(method, path, withMiddleware(h, mw...))
}

func (r routeAdder) GET(path string, h echo.HandlerFunc, mw ...echo.MiddlewareFunc) *echo.Route {
	return r.add(http.MethodGet, path, h, mw)
}

func (r routeAdder) POST(path string, h echo.HandlerFunc, mw ...echo.MiddlewareFunc) *echo.Route {
	return r.add(http.MethodPost, path, h, mw)
}

func (r routeAdder) PUT(path string, h echo.HandlerFunc, mw ...echo.MiddlewareFunc) *echo.Route {
	return r.add(http.MethodPut, path, h, mw)
}

func (r routeAdder) PATCH(path string, h echo.HandlerFunc, mw ...echo.MiddlewareFunc) *echo.Route {
	return r.add(http.MethodPatch, path, h, mw)
}

func (r routeAdder) DELETE(path string, h echo.HandlerFunc, mw ...echo.MiddlewareFunc) *echo.Route {
	return r.add(http.MethodDelete, path, h, mw)
}

// withMiddleware is h inside mw, the first outermost, as echo orders them.
func withMiddleware(h echo.HandlerFunc, mw ...echo.MiddlewareFunc) echo.HandlerFunc {
	for i := len(mw) - 1; i >= 0; i-- {
		h = mw[i](h)
	}
	return h
}
