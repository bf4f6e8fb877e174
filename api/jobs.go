package api

import (
	"context"
	"encoding/base64"
	"errors"
	"fmt"
	"net/http"
	"strconv"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/internal/jobs"
	"github.com/qtally/qtally/training"
)

// Jobs queues evaluations and replays and reports on them.
type Jobs interface {
	QueueEvaluation(ctx context.Context, policy string, req training.EvaluationRequest) (jobs.View, error)
	QueueReplay(ctx context.Context, policy string, req training.ReplayRequest) (jobs.View, error)
	Job(ctx context.Context, policy string, kind jobs.Kind, id int64) (jobs.View, error)
	ListJobs(ctx context.Context, policy string, kind jobs.Kind, q jobs.Query) (jobs.Page, error)
}

// jobPaths are the collection paths of each kind of job.
var jobPaths = map[jobs.Kind]string{
	jobs.EvaluationKind: "evaluations",
	jobs.ReplayKind:     "replays",
}

// accepted answers 202 with the queued job and where to follow it.
func accepted(c echo.Context, job jobs.View) error {
	c.Response().Header().Set(echo.HeaderLocation, fmt.Sprintf("/v1/policies/%s/%s/%d", job.Policy, jobPaths[job.Kind], job.ID))
	return c.JSON(http.StatusAccepted, job)
}

func handleQueueEvaluation(j Jobs, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		policy, err := policyParam(c)
		if err != nil {
			return err
		}
		var req training.EvaluationRequest
		if err = bindJSON(c, cfg.MaxBodyBytes, &req); err != nil {
			return err
		}
		req = req.WithDefaults()
		if err = req.Validate(); err != nil {
			return err
		}
		job, err := j.QueueEvaluation(c.Request().Context(), policy, req)
		if err != nil {
			return err
		}
		return accepted(c, job)
	}
}

func handleQueueReplay(j Jobs, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		policy, err := policyParam(c)
		if err != nil {
			return err
		}
		var req training.ReplayRequest
		if err = bindJSON(c, cfg.MaxBodyBytes, &req); err != nil {
			return err
		}
		if err = req.Validate(); err != nil {
			return err
		}
		if string(req.Target) == policy {
			return training.Invalid(-1, -1, "target", "must name a new policy, not the source")
		}
		job, err := j.QueueReplay(c.Request().Context(), policy, req)
		if err != nil {
			return err
		}
		return accepted(c, job)
	}
}

func handleGetJob(j Jobs, kind jobs.Kind) echo.HandlerFunc {
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
		var missing *jobs.NotFoundError
		if errors.As(err, &missing) {
			return jobNotFound(missing)
		}
		if err != nil {
			return err
		}
		if err := authorizeJobNames(c, job); err != nil {
			return err
		}
		return c.JSON(http.StatusOK, job)
	}
}

// jobNotFound says where to look instead: the job's own path when the id
// is the policy's job of the other kind, else the policy's listing (an id
// from another policy's path is not found under this one).
func jobNotFound(e *jobs.NotFoundError) error {
	if e.OtherKind != "" {
		return training.NotFoundf("%s; read it at GET /v1/policies/%s/%s/%d", e, e.Policy, jobPaths[e.OtherKind], e.ID)
	}
	return training.NotFoundf("%s; job ids are numbered across all policies, so a job posted under another policy is read under that policy's path; GET /v1/policies/%s/%s lists this policy's",
		e, e.Policy, jobPaths[e.Kind])
}

type jobsResponse struct {
	Jobs []jobs.View `json:"jobs"`
	// NextCursor continues the listing; absent on its last page.
	NextCursor string `json:"next_cursor,omitempty"`
}

// handleListJobs lists a policy's jobs of a kind, newest first, a page at
// a time.
func handleListJobs(j Jobs, kind jobs.Kind) echo.HandlerFunc {
	return func(c echo.Context) error {
		policy, err := policyParam(c)
		if err != nil {
			return err
		}
		q := jobs.Query{Limit: jobs.DefaultPage}
		if s := c.QueryParam("limit"); s != "" {
			n, parseErr := strconv.Atoi(s)
			if parseErr != nil || n < 1 || n > jobs.MaxPage {
				return training.Invalid(-1, -1, "limit", "must be a whole number from 1 to %d", jobs.MaxPage)
			}
			q.Limit = n
		}
		if s := c.QueryParam("cursor"); s != "" {
			if q.Before = decodeJobCursor(s); q.Before < 1 {
				return training.Invalid(-1, -1, "cursor", "is not a cursor this service handed out; start the listing again without it")
			}
		}
		page, err := j.ListJobs(c.Request().Context(), policy, kind, q)
		if err != nil {
			return err
		}
		res := jobsResponse{Jobs: page.Jobs}
		if res.Jobs == nil {
			res.Jobs = []jobs.View{}
		}
		if page.Next > 0 {
			res.NextCursor = base64.RawURLEncoding.EncodeToString([]byte(strconv.FormatInt(page.Next, 10)))
		}
		return c.JSON(http.StatusOK, res)
	}
}

// decodeJobCursor reads the job id a cursor continues before; 0 when the
// cursor is not one.
func decodeJobCursor(s string) int64 {
	data, err := base64.RawURLEncoding.DecodeString(s)
	if err != nil {
		return 0
	}
	id, err := strconv.ParseInt(string(data), 10, 64)
	if err != nil {
		return 0
	}
	return id
}
