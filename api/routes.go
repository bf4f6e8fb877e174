package api

import (
	"github.com/labstack/echo/v4"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"github.com/qtally/qtally/internal/access"
	"github.com/qtally/qtally/internal/jobs"
)

// addHealthRoutes serves what every process serves, API or worker.
func addHealthRoutes(e *echo.Echo, d Deps) {
	e.GET("/livez", handleLive())
	e.GET("/readyz", handleReady(d.Ready))
	e.GET("/metrics", echo.WrapHandler(promhttp.HandlerFor(d.Gatherer, promhttp.HandlerOpts{})))
}

// addAPIRoutes serves the policy API. Every route needs a valid token (g
// checks that for all requests); each names the scope it needs on top.
func addAPIRoutes(e *echo.Echo, cfg Config, d Deps, g *guard, audit auditedRoutes) {
	e.GET("/v1/openapi.json", handleOpenAPI(cfg.ProblemDocs))

	// Every admin route is registered through audit.add, so that each of its
	// requests goes to the audit log (TestEveryRouteEnforcesAccess checks).
	admin, ingest, choose := g.requireScope(access.ScopeAdmin), g.requireScope(access.ScopeIngest), g.requireScope(access.ScopeChoose)
	bulk := bulkDeadline(cfg.BulkTimeout)
	audit.add(e.GET("/v1/policies", handleListPolicies(d.Policies), admin))
	audit.add(e.GET("/v1/audit", handleAuditLog(d.Audit), admin))
	// Applications read their policy's backlog and revision with the
	// scopes they have.
	audit.add(e.GET("/v1/policies/:policy", handleGetPolicy(d.Policies),
		g.requireScope(access.ScopeAdmin, access.ScopeChoose, access.ScopeIngest)))
	audit.add(e.PUT("/v1/policies/:policy", handlePutPolicy(d.Policies, cfg), admin))
	audit.add(e.PATCH("/v1/policies/:policy", handlePatchPolicy(d.Policies, cfg), admin))
	audit.add(e.DELETE("/v1/policies/:policy", handleDeletePolicy(d.Eraser), admin))
	audit.add(e.GET("/v1/policies/:policy/settings-history", handleSettingsHistory(d.History), admin))
	audit.add(e.DELETE("/v1/policies/:policy/episodes/:episode", handleEraseEpisode(d.Eraser), admin))
	e.POST("/v1/policies/:policy/episodes", handlePostEpisodes(d.Episodes, d.Metrics, cfg), ingest, bulk)
	e.POST("/v1/policies/:policy/choose", handleChoose(d.Chooser, d.Recorder, d.Metrics, cfg), choose)
	e.POST("/v1/policies/:policy/open-episodes/:episode/rewards", handleAddReward(d.OpenEpisodes, d.Metrics, cfg), ingest)
	e.POST("/v1/policies/:policy/open-episodes/:episode/end", handleEndEpisode(d.OpenEpisodes, d.Metrics, cfg), ingest)
	e.GET("/v1/policies/:policy/open-episodes/:episode", handleGetOpenEpisode(d.OpenEpisodes, cfg),
		g.requireScope(access.ScopeIngest, access.ScopeChoose))
	e.GET("/v1/policies/:policy/states", handleListStates(d.States), choose)
	e.GET("/v1/policies/:policy/states/:state", handleGetState(d.States, cfg), choose)

	audit.add(e.GET("/v1/policies/:policy/table", handleExportTable(d.Snapshots, false), admin, bulk))
	audit.add(e.PUT("/v1/policies/:policy/table", handleImportTable(d.Tables, cfg), admin, bulk))
	audit.add(e.GET("/v1/policies/:policy/diff", handleDiffTables(d.Snapshots), admin))
	audit.add(e.GET("/v1/policies/:policy/snapshots", handleListSnapshots(d.Snapshots), admin))
	audit.add(e.POST("/v1/policies/:policy/snapshots", handleCreateSnapshot(d.Snapshots, cfg), admin))
	audit.add(e.GET("/v1/policies/:policy/snapshots/:snapshot", handleGetSnapshot(d.Snapshots), admin))
	audit.add(e.DELETE("/v1/policies/:policy/snapshots/:snapshot", handleDeleteSnapshot(d.Snapshots), admin))
	audit.add(e.GET("/v1/policies/:policy/snapshots/:snapshot/table", handleExportTable(d.Snapshots, true), admin, bulk))
	audit.add(e.POST("/v1/policies/:policy/snapshots/:snapshot/restore", handleRestoreSnapshot(d.Tables), admin))
	audit.add(e.POST("/v1/policies/:policy/evaluations", handleQueueEvaluation(d.Jobs, cfg), admin))
	audit.add(e.GET("/v1/policies/:policy/evaluations", handleListJobs(d.Jobs, jobs.EvaluationKind), admin))
	audit.add(e.GET("/v1/policies/:policy/evaluations/:id", handleGetJob(d.Jobs, jobs.EvaluationKind), admin))
	audit.add(e.POST("/v1/policies/:policy/replays", handleQueueReplay(d.Jobs, cfg), admin))
	audit.add(e.GET("/v1/policies/:policy/replays", handleListJobs(d.Jobs, jobs.ReplayKind), admin))
	audit.add(e.GET("/v1/policies/:policy/replays/:id", handleGetJob(d.Jobs, jobs.ReplayKind), admin))
}

// addStatusRoutes serves the status pages for people; they show every
// policy's figures, so they need the admin scope.
func addStatusRoutes(e *echo.Echo, cfg Config, d Deps, g *guard) {
	admin := g.requireScope(access.ScopeAdmin)
	if g != nil {
		s := &signIn{auth: g.auth, sessions: g.sessions, attempts: newAddressLimiter(cfg.SignInAttemptsPerMinute, maxTrackedAddresses),
			trustedProxy: cfg.fromTrustedProxy}
		e.GET(signInPath, handleSignInPage())
		e.POST(signInPath, s.handleSignIn())
		e.POST(signOutPath, s.handleSignOut())
	}
	e.GET("/", handleOverview(d.Policies), admin)
	e.GET("/policies/:policy", handlePolicyPage(d.Reports, d.History, d.OpenEpisodes, cfg), admin)
	e.GET("/policies/:policy/states", handleStatesPage(d.States), admin)
}
