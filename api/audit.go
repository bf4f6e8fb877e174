package api

import (
	"context"
	"log/slog"
	"net/http"
	"strconv"
	"time"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/internal/access"
	"github.com/qtally/qtally/training"
)

// AuditLog keeps the record of admin actions.
type AuditLog interface {
	RecordAudit(ctx context.Context, e access.AuditEntry) error
	AuditLog(ctx context.Context, q access.AuditQuery) (access.AuditPage, error)
}

// auditWriteTimeout bounds writing one entry after the answer is sent.
const auditWriteTimeout = 5 * time.Second

// auditedRoutes are the routes whose requests the audit log records: the
// admin routes of the API, as "METHOD /pattern".
type auditedRoutes map[string]bool

func (a auditedRoutes) add(r *echo.Route) { a[r.Method+" "+r.Path] = true }

// record writes every request of an audited route that carried a valid
// token (any request, with authentication off) to the audit log, with its
// outcome, refusals included.
func (a auditedRoutes) record(log AuditLog, logger *slog.Logger) echo.MiddlewareFunc {
	return func(next echo.HandlerFunc) echo.HandlerFunc {
		return func(c echo.Context) error {
			if !a[c.Request().Method+" "+c.Path()] {
				return next(c)
			}
			if err := next(c); err != nil {
				c.Error(err) // answer now, so that the entry holds the status sent
			}
			e := access.AuditEntry{Via: access.AuditViaAPI, Method: c.Request().Method, Route: c.Path(),
				Path: c.Request().URL.RequestURI(), PoliciesNamed: namedPolicies(c), Status: c.Response().Status,
				Object: c.Response().Header().Get(echo.HeaderLocation), TokenLabel: "(authentication off)"}
			if name, err := pathParam(c, "policy"); err == nil && training.ValidatePolicyName(name) == nil {
				e.Policy = name
			}
			if tok := requestToken(c); tok != nil {
				id := tok.ID
				e.TokenID, e.TokenLabel = &id, tok.Label
			}
			// The client may be gone; the record is written all the same.
			ctx, cancel := context.WithTimeout(context.WithoutCancel(c.Request().Context()), auditWriteTimeout)
			defer cancel()
			if err := log.RecordAudit(ctx, e); err != nil {
				logger.Error("writing the audit log", logKeyRequestID, requestID(c), logKeyMethod, e.Method, logKeyRoute, e.Route,
					logKeyStatus, e.Status, logKeyError, err)
			}
			return nil
		}
	}
}

func handleAuditLog(log AuditLog) echo.HandlerFunc {
	return func(c echo.Context) error {
		q := access.AuditQuery{Policy: c.QueryParam("policy"), Limit: access.DefaultAuditLimit}
		var checks []error
		if q.Policy != "" && training.ValidatePolicyName(q.Policy) != nil {
			checks = append(checks, training.Invalid(-1, -1, "policy", "is not a valid policy name"))
		}
		if v := c.QueryParam("limit"); v != "" {
			n, err := strconv.Atoi(v)
			if err != nil || n < 1 || n > access.MaxAuditLimit {
				checks = append(checks, training.Invalid(-1, -1, "limit", "must be a whole number from 1 to %d", access.MaxAuditLimit))
			}
			q.Limit = n
		}
		if v := c.QueryParam("before"); v != "" {
			n, err := strconv.ParseInt(v, 10, 64)
			if err != nil || n < 1 {
				checks = append(checks, training.Invalid(-1, -1, "before", "must be an entry id (a whole number, at least 1)"))
			}
			q.Before = n
		}
		if err := joinProblems(checks...); err != nil {
			return err
		}
		// A token limited to some policies reads only their entries.
		if tok := requestToken(c); tok != nil && len(tok.Policies) > 0 {
			q.Visible = tok.Policies
		}
		page, err := log.AuditLog(c.Request().Context(), q)
		if err != nil {
			return err
		}
		return c.JSON(http.StatusOK, page)
	}
}
