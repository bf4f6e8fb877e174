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

// addAPIRoutes serves the policy API. Every route needs a valid token (g
// checks that for all requests); each names the scope it needs on top.
func addAPIRoutes(e *echo.Echo, cfg Config, d Deps, g *guard) {
	e.GET("/v1/openapi.json", handleOpenAPI())

	admin, ingest, choose := g.requireScope(training.ScopeAdmin), g.requireScope(training.ScopeIngest), g.requireScope(training.ScopeChoose)
	e.GET("/v1/policies", handleListPolicies(d.Policies), admin)
	e.GET("/v1/policies/:policy", handleGetPolicy(d.Policies), admin)
	e.PUT("/v1/policies/:policy", handlePutPolicy(d.Policies, cfg), admin)
	e.POST("/v1/policies/:policy/episodes", handlePostEpisodes(d.Episodes, d.Metrics, cfg), ingest)
	e.POST("/v1/policies/:policy/choose", handleChoose(d.Chooser, d.Metrics, cfg), choose)
	e.GET("/v1/policies/:policy/states/:state", handleGetState(d.States, cfg), choose)
}
