package api

import (
	"github.com/labstack/echo/v4"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"github.com/qtally/qtally/training"
)

// addHealthRoutes serves what every process serves, API or worker.
func addHealthRoutes(e *echo.Echo, d Deps) {
	e.GET("/livez", handleLive())
	e.GET("/readyz", handleReady(d.Ready))
	e.GET("/metrics", echo.WrapHandler(promhttp.HandlerFor(d.Gatherer, promhttp.HandlerOpts{})))
}

// addAPIRoutes serves the policy API.
func addAPIRoutes(e *echo.Echo, cfg Config, d Deps) {
	e.GET("/v1/openapi.json", handleOpenAPI())

	e.GET("/v1/policies", handleListPolicies(d.Policies))
	e.GET("/v1/policies/:policy", handleGetPolicy(d.Policies))
	e.PUT("/v1/policies/:policy", handlePutPolicy(d.Policies, cfg))
	e.POST("/v1/policies/:policy/episodes", handlePostEpisodes(d.Episodes, d.Metrics, cfg))
	e.POST("/v1/policies/:policy/choose", handleChoose(d.Chooser, d.Metrics, cfg))
	e.GET("/v1/policies/:policy/states", handleListStates(d.Inspect))
	e.GET("/v1/policies/:policy/states/:state", handleGetState(d.States))

	e.GET("/v1/policies/:policy/table", handleExportTable(d.Snapshots, false))
	e.PUT("/v1/policies/:policy/table", handleImportTable(d.Tables, cfg))
	e.GET("/v1/policies/:policy/diff", handleDiffTables(d.Snapshots))
	e.GET("/v1/policies/:policy/snapshots", handleListSnapshots(d.Snapshots))
	e.POST("/v1/policies/:policy/snapshots", handleCreateSnapshot(d.Snapshots, cfg))
	e.GET("/v1/policies/:policy/snapshots/:snapshot", handleGetSnapshot(d.Snapshots))
	e.DELETE("/v1/policies/:policy/snapshots/:snapshot", handleDeleteSnapshot(d.Snapshots))
	e.GET("/v1/policies/:policy/snapshots/:snapshot/table", handleExportTable(d.Snapshots, true))
	e.POST("/v1/policies/:policy/snapshots/:snapshot/restore", handleRestoreSnapshot(d.Tables))
	e.POST("/v1/policies/:policy/evaluations", handleStartEvaluation(d.Jobs, cfg))
	e.GET("/v1/policies/:policy/evaluations/:id", handleGetJob(d.Jobs, training.EvaluationJobKind))
	e.POST("/v1/policies/:policy/replays", handleStartReplay(d.Jobs, cfg))
	e.GET("/v1/policies/:policy/replays/:id", handleGetJob(d.Jobs, training.ReplayJobKind))
}

// addStatusRoutes serves the status pages for people.
func addStatusRoutes(e *echo.Echo, cfg Config, d Deps) {
	e.GET("/", handleOverview(d.Policies))
	e.GET("/policies/:policy", handlePolicyPage(d.Inspect, cfg))
	e.GET("/policies/:policy/states", handleStatesPage(d.Inspect))
}
