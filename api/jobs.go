package api

import (
	"context"
	"fmt"
	"net/http"
	"strconv"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/training"
)

// Jobs queues evaluations and replays and reports on them.
type Jobs interface {
	StartEvaluation(ctx context.Context, policy string, req training.EvaluationRequest) (training.JobView, error)
	StartReplay(ctx context.Context, policy string, req training.ReplayRequest) (training.JobView, error)
	Job(ctx context.Context, policy string, kind training.JobKind, id int64) (training.JobView, error)
}

// jobPaths are the collection paths of each kind of job.
var jobPaths = map[training.JobKind]string{
	training.EvaluationJobKind: "evaluations",
	training.ReplayJobKind:     "replays",
}

// accepted answers 202 with the queued job and where to follow it.
func accepted(c echo.Context, job training.JobView) error {
	c.Response().Header().Set(echo.HeaderLocation, fmt.Sprintf("/v1/policies/%s/%s/%d", job.Policy, jobPaths[job.Kind], job.ID))
	return c.JSON(http.StatusAccepted, job)
}

func handleStartEvaluation(j Jobs, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		policy, err := policyParam(c)
		if err != nil {
			return err
		}
		var req training.EvaluationRequest
		if err := bindJSON(c, cfg.MaxBodyBytes, &req); err != nil {
			return err
		}
		req = req.WithDefaults()
		if err := req.Validate(); err != nil {
			return err
		}
		job, err := j.StartEvaluation(c.Request().Context(), policy, req)
		if err != nil {
			return err
		}
		return accepted(c, job)
	}
}

func handleStartReplay(j Jobs, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		policy, err := policyParam(c)
		if err != nil {
			return err
		}
		var req training.ReplayRequest
		if err := bindJSON(c, cfg.MaxBodyBytes, &req); err != nil {
			return err
		}
		if err := req.Validate(); err != nil {
			return err
		}
		if string(req.Target) == policy {
			return training.Invalid(-1, -1, "target", "must name a new policy, not the source")
		}
		job, err := j.StartReplay(c.Request().Context(), policy, req)
		if err != nil {
			return err
		}
		return accepted(c, job)
	}
}

func handleGetJob(j Jobs, kind training.JobKind) echo.HandlerFunc {
	return func(c echo.Context) error {
		policy, err := policyParam(c)
		if err != nil {
			return err
		}
		id, err := strconv.ParseInt(c.Param("id"), 10, 64)
		if err != nil || id < 1 {
			return training.Invalid(-1, -1, "id", "must be a job number")
		}
		job, err := j.Job(c.Request().Context(), policy, kind, id)
		if err != nil {
			return err
		}
		if err := authorizeJobNames(c, job); err != nil {
			return err
		}
		return c.JSON(http.StatusOK, job)
	}
}
