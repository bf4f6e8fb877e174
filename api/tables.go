package api

import (
	"bytes"
	"context"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"net/http"
	"slices"
	"strconv"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/training"
)

// Snapshots freezes, lists, reads and compares Q tables.
type Snapshots interface {
	CreateSnapshot(ctx context.Context, policy, name string) (training.Snapshot, error)
	ListSnapshots(ctx context.Context, policy string) ([]training.Snapshot, error)
	Snapshot(ctx context.Context, policy, name string) (training.Snapshot, error)
	DeleteSnapshot(ctx context.Context, policy, name string) error
	ExportTable(ctx context.Context, policy, table string) (training.TableExport, error)
	DiffTables(ctx context.Context, policy, table, againstPolicy, against string, limit int) (training.TableDiff, error)
}

// TableWriter replaces a policy's live table.
type TableWriter interface {
	RestoreSnapshot(ctx context.Context, policy, snapshot string) (training.TableChange, error)
	ImportTable(ctx context.Context, policy string, rows []training.TableRow, initialQ *float64) (training.TableChange, error)
}

const mediaCSV = "text/csv"

// csvHeader is the first line of a table in CSV.
var csvHeader = []string{"state", "action", "q", "visits"}

// Diff limits.
const (
	defaultDiffLimit = 100
	maxDiffLimit     = 10_000
)

// snapshotParam reads and checks the snapshot name of the path.
func snapshotParam(c echo.Context) (string, error) {
	name := c.Param("snapshot")
	if training.ValidateSnapshotName(name) != nil {
		return "", training.Invalid(-1, -1, "snapshot", "%q is not a snapshot name", training.Truncate(name, 64))
	}
	return name, nil
}

// snapshotParams reads the policy and snapshot names of the path.
func snapshotParams(c echo.Context) (string, string, error) {
	policy, err := policyParam(c)
	if err != nil {
		return "", "", err
	}
	name, err := snapshotParam(c)
	return policy, name, err
}

func handleCreateSnapshot(s Snapshots, cfg Config) echo.HandlerFunc {
	type request struct {
		Name string `json:"name"`
	}
	return func(c echo.Context) error {
		policy, err := policyParam(c)
		if err != nil {
			return err
		}
		var req request
		if err = bindJSON(c, cfg.MaxBodyBytes, &req); err != nil {
			return err
		}
		if err = training.ValidateSnapshotName(req.Name); err != nil {
			return err
		}
		snap, err := s.CreateSnapshot(c.Request().Context(), policy, req.Name)
		if err != nil {
			return err
		}
		c.Response().Header().Set(echo.HeaderLocation, fmt.Sprintf("/v1/policies/%s/snapshots/%s", policy, snap.Name))
		return c.JSON(http.StatusCreated, snap)
	}
}

func handleListSnapshots(s Snapshots) echo.HandlerFunc {
	type response struct {
		Snapshots []training.Snapshot `json:"snapshots"`
	}
	return func(c echo.Context) error {
		policy, err := policyParam(c)
		if err != nil {
			return err
		}
		list, err := s.ListSnapshots(c.Request().Context(), policy)
		if err != nil {
			return err
		}
		if list == nil {
			list = []training.Snapshot{}
		}
		return c.JSON(http.StatusOK, response{Snapshots: list})
	}
}

func handleGetSnapshot(s Snapshots) echo.HandlerFunc {
	return func(c echo.Context) error {
		policy, name, err := snapshotParams(c)
		if err != nil {
			return err
		}
		snap, err := s.Snapshot(c.Request().Context(), policy, name)
		if err != nil {
			return err
		}
		return c.JSON(http.StatusOK, snap)
	}
}

func handleDeleteSnapshot(s Snapshots) echo.HandlerFunc {
	return func(c echo.Context) error {
		policy, name, err := snapshotParams(c)
		if err != nil {
			return err
		}
		if err := s.DeleteSnapshot(c.Request().Context(), policy, name); err != nil {
			return err
		}
		return c.NoContent(http.StatusNoContent)
	}
}

// handleExportTable answers a policy's live table (snapshot false) or the
// snapshot of the path, as JSON or, with format=csv, as CSV.
func handleExportTable(s Snapshots, snapshot bool) echo.HandlerFunc {
	return func(c echo.Context) error {
		policy, err := policyParam(c)
		if err != nil {
			return err
		}
		table := training.LiveTable
		if snapshot {
			if table, err = snapshotParam(c); err != nil {
				return err
			}
		}
		format := c.QueryParam("format")
		if format != "" && format != "json" && format != "csv" {
			return training.Invalid(-1, -1, "format", "must be json or csv")
		}
		export, err := s.ExportTable(c.Request().Context(), policy, table)
		if err != nil {
			return err
		}
		if format != "csv" {
			return c.JSON(http.StatusOK, export)
		}
		var buf bytes.Buffer
		w := csv.NewWriter(&buf)
		_ = w.Write(csvHeader) // a bytes.Buffer does not fail
		for _, r := range export.Rows {
			_ = w.Write([]string{r.State, r.Action, strconv.FormatFloat(r.Q, 'g', -1, 64), strconv.FormatInt(r.Visits, 10)})
		}
		w.Flush()
		return c.Blob(http.StatusOK, mediaCSV+"; charset=utf-8", buf.Bytes())
	}
}

func handleImportTable(t TableWriter, cfg Config) echo.HandlerFunc {
	return func(c echo.Context) error {
		policy, err := policyParam(c)
		if err != nil {
			return err
		}
		body, media, err := readBody(c, cfg.MaxBodyBytes, mediaJSON, mediaCSV)
		if err != nil {
			return err
		}
		rows, initialQ, err := decodeTable(body, media, c.QueryParam("initial_q"))
		if err != nil {
			return err
		}
		ch, err := t.ImportTable(c.Request().Context(), policy, rows, initialQ)
		if err != nil {
			return err
		}
		return c.JSON(http.StatusOK, ch)
	}
}

// tableDocument is a table to import as JSON: an export document, whose
// initial_q may be left out.
type tableDocument struct {
	training.TableExport
	InitialQ *float64 `json:"initial_q"`
}

// decodeTable reads rows, and their initial value when the document or the
// query names one, from an exported JSON document or from CSV (which has
// no place for it).
func decodeTable(body []byte, media, initialQuery string) ([]training.TableRow, *float64, error) {
	var initialQ *float64
	if initialQuery != "" {
		x, err := strconv.ParseFloat(initialQuery, 64)
		if err != nil {
			return nil, nil, training.Invalid(-1, -1, "initial_q", "%q is not a number", training.Truncate(initialQuery, 64))
		}
		initialQ = &x
	}
	if media == mediaJSON {
		var doc tableDocument
		if err := decodeStrict(body, &doc, -1); err != nil {
			return nil, nil, err
		}
		if doc.Rows == nil {
			return nil, nil, training.Invalid(-1, -1, "rows", "is missing")
		}
		if doc.InitialQ != nil && initialQ != nil && *doc.InitialQ != *initialQ {
			return nil, nil, training.Invalid(-1, -1, "initial_q", "the query says %g, the document %g; give one", *initialQ, *doc.InitialQ)
		}
		if doc.InitialQ != nil {
			initialQ = doc.InitialQ
		}
		return doc.Rows, initialQ, training.CheckInitialQ(initialQ)
	}
	rows, err := decodeCSVTable(body)
	if err != nil {
		return nil, nil, err
	}
	return rows, initialQ, training.CheckInitialQ(initialQ)
}

// decodeCSVTable reads rows from CSV with a header line.
func decodeCSVTable(body []byte) ([]training.TableRow, error) {
	r := csv.NewReader(bytes.NewReader(body))
	r.FieldsPerRecord = len(csvHeader)
	r.ReuseRecord = true
	header, err := r.Read()
	if errors.Is(err, io.EOF) {
		return nil, training.Invalid(-1, -1, "", "the CSV is empty; it needs the header line %q", "state,action,q,visits")
	}
	if err != nil || !slices.Equal(header, csvHeader) {
		return nil, training.Invalid(-1, -1, "", "the first CSV line must be the header %q", "state,action,q,visits")
	}
	var rows []training.TableRow
	for {
		rec, err := r.Read()
		if errors.Is(err, io.EOF) {
			return rows, nil
		}
		i := len(rows)
		if err != nil {
			return nil, training.Invalid(-1, -1, fmt.Sprintf("rows[%d]", i), "malformed CSV: %s", err.Error())
		}
		line, _ := r.FieldPos(0)
		q, qErr := strconv.ParseFloat(rec[2], 64)
		visits, vErr := strconv.ParseInt(rec[3], 10, 64)
		switch {
		case qErr != nil:
			return nil, training.Invalid(-1, -1, fmt.Sprintf("rows[%d].q", i), "line %d: %q is not a number", line, rec[2])
		case vErr != nil:
			return nil, training.Invalid(-1, -1, fmt.Sprintf("rows[%d].visits", i), "line %d: %q is not a whole number", line, rec[3])
		}
		rows = append(rows, training.TableRow{State: rec[0], Action: rec[1], Q: q, Visits: visits})
	}
}

func handleRestoreSnapshot(t TableWriter) echo.HandlerFunc {
	return func(c echo.Context) error {
		policy, name, err := snapshotParams(c)
		if err != nil {
			return err
		}
		ch, err := t.RestoreSnapshot(c.Request().Context(), policy, name)
		if err != nil {
			return err
		}
		return c.JSON(http.StatusOK, ch)
	}
}

func handleDiffTables(s Snapshots) echo.HandlerFunc {
	return func(c echo.Context) error {
		policy, err := policyParam(c)
		if err != nil {
			return err
		}
		from, to := c.QueryParam("from"), c.QueryParam("to")
		if from == "" {
			from = training.LiveTable
		}
		if to == "" {
			to = training.LiveTable
		}
		toPolicy := c.QueryParam("to_policy")
		if toPolicy == "" {
			toPolicy = policy
		}
		checks := []error{training.ValidateTableName("from", from), training.ValidateTableName("to", to)}
		if training.ValidatePolicyName(toPolicy) != nil {
			checks = append(checks, training.Invalid(-1, -1, "to_policy", "is not a valid policy name"))
		}
		limit := defaultDiffLimit
		if v := c.QueryParam("limit"); v != "" {
			n, parseErr := strconv.Atoi(v)
			if parseErr != nil || n < 1 || n > maxDiffLimit {
				checks = append(checks, training.Invalid(-1, -1, "limit", "must be a whole number from 1 to %d", maxDiffLimit))
			}
			limit = n
		}
		if err = joinProblems(checks...); err != nil {
			return err
		}
		if from == to && toPolicy == policy {
			return training.Invalid(-1, -1, "to", "compares %q with itself; name another table or policy", from)
		}
		d, err := s.DiffTables(c.Request().Context(), policy, from, toPolicy, to, limit)
		if err != nil {
			return err
		}
		return c.JSON(http.StatusOK, d)
	}
}

// joinProblems merges validation errors into one that lists them all.
func joinProblems(errs ...error) error {
	var all training.ValidationError
	for _, err := range errs {
		var verr *training.ValidationError
		if errors.As(err, &verr) {
			all.Problems = append(all.Problems, verr.Problems...)
		} else if err != nil {
			return err
		}
	}
	if len(all.Problems) == 0 {
		return nil
	}
	return &all
}
