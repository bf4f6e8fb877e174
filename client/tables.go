package client

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"strconv"
	"time"
)

// Format is a table's exchange format.
type Format string

// Table formats.
const (
	JSON Format = "json"
	CSV  Format = "csv"
)

func (f Format) mediaType() string {
	if f == CSV {
		return "text/csv"
	}
	return "application/json"
}

// LiveTable names a policy's live table where a table name is asked for.
const LiveTable = "live"

// TableRow is one learned pair.
type TableRow struct {
	State  string  `json:"state"`
	Action string  `json:"action"`
	Q      float64 `json:"q"`
	Visits int64   `json:"visits"`
}

// Table is an exported Q table.
type Table struct {
	Policy string `json:"policy"`
	// Table is LiveTable or the snapshot's name.
	Table    string     `json:"table"`
	Revision int64      `json:"revision"`
	Actions  []string   `json:"actions"`
	InitialQ float64    `json:"initial_q"`
	Rows     []TableRow `json:"rows"`
}

// TableChange is the answer to an import or a restore.
type TableChange struct {
	Policy string `json:"policy"`
	// Source is the snapshot restored, or "import".
	Source   string `json:"source"`
	Revision int64  `json:"revision"`
	Pairs    int64  `json:"pairs"`
	// InitialQ is the policy's initial value after the change.
	InitialQ float64 `json:"initial_q"`
}

// Snapshot is a frozen copy of a policy's table.
type Snapshot struct {
	Name      string    `json:"name"`
	CreatedAt time.Time `json:"created_at"`
	// Revision is the policy's revision when frozen.
	Revision int64    `json:"revision"`
	Actions  []string `json:"actions"`
	InitialQ float64  `json:"initial_q"`
	States   int64    `json:"states"`
	Pairs    int64    `json:"pairs"`
	// TrainedThroughSeq is the last episode the table had learned from:
	// later ones are held out from it.
	TrainedThroughSeq int64 `json:"trained_through_seq"`
}

func tablePath(policy, snapshot string) string {
	if snapshot == "" || snapshot == LiveTable {
		return policyPath(policy, "table")
	}
	return policyPath(policy, "snapshots", snapshot, "table")
}

// ExportTable writes a policy's live table (snapshot "" or LiveTable) or a
// snapshot's to w, as the service sends it.
func (c *Client) ExportTable(ctx context.Context, policy, snapshot string, format Format, w io.Writer) error {
	path := tablePath(policy, snapshot)
	resp, err := c.do(ctx, call{method: http.MethodGet, path: path, query: url.Values{"format": {string(format)}}, repeatable: true})
	if err != nil {
		return err
	}
	defer resp.Body.Close()
	if _, err := io.Copy(w, resp.Body); err != nil {
		return fmt.Errorf("GET %s: read the table: %w", path, err)
	}
	return nil
}

// Table reads a policy's live table (snapshot "" or LiveTable) or a
// snapshot's.
func (c *Client) Table(ctx context.Context, policy, snapshot string) (Table, error) {
	var t Table
	_, err := c.doJSON(ctx, call{method: http.MethodGet, path: tablePath(policy, snapshot), repeatable: true}, &t)
	return t, err
}

// ImportTable replaces a policy's live table with one read from r (as
// ExportTable writes it). When r is an io.Seeker (a file) a failed attempt
// is retried from r's position at the call; any other reader is sent once,
// without retries.
func (c *Client) ImportTable(ctx context.Context, policy string, format Format, r io.Reader) (TableChange, error) {
	cl := call{method: http.MethodPut, path: policyPath(policy, "table"), contentType: format.mediaType()}
	if s, ok := r.(io.Seeker); ok {
		if start, err := s.Seek(0, io.SeekCurrent); err == nil {
			cl.repeatable = true
			cl.body = func() (io.Reader, error) {
				if _, err := s.Seek(start, io.SeekStart); err != nil {
					return nil, err
				}
				return readerOnly{r}, nil
			}
		}
	}
	if cl.body == nil {
		cl.once = true
		cl.body = func() (io.Reader, error) { return readerOnly{r}, nil }
	}
	var ch TableChange
	_, err := c.doJSON(ctx, cl, &ch)
	return ch, err
}

// ImportRows replaces a policy's live table with rows; initialQ, when not
// nil, becomes the policy's initial value.
func (c *Client) ImportRows(ctx context.Context, policy string, rows []TableRow, initialQ *float64) (TableChange, error) {
	doc := struct {
		InitialQ *float64   `json:"initial_q,omitempty"`
		Rows     []TableRow `json:"rows"`
	}{initialQ, rows}
	if doc.Rows == nil {
		doc.Rows = []TableRow{}
	}
	var ch TableChange
	_, err := c.sendJSON(ctx, http.MethodPut, policyPath(policy, "table"), true, doc, &ch)
	return ch, err
}

// CreateSnapshot freezes a policy's live table under name. It is sent
// again only after a 429: after a lost answer a second try would find the
// name taken.
func (c *Client) CreateSnapshot(ctx context.Context, policy, name string) (Snapshot, error) {
	var s Snapshot
	_, err := c.sendJSON(ctx, http.MethodPost, policyPath(policy, "snapshots"), false, map[string]string{"name": name}, &s)
	return s, err
}

// Snapshots lists a policy's snapshots.
func (c *Client) Snapshots(ctx context.Context, policy string) ([]Snapshot, error) {
	var page struct {
		Snapshots []Snapshot `json:"snapshots"`
	}
	_, err := c.doJSON(ctx, call{method: http.MethodGet, path: policyPath(policy, "snapshots"), repeatable: true}, &page)
	return page.Snapshots, err
}

// Snapshot reads one snapshot's description.
func (c *Client) Snapshot(ctx context.Context, policy, name string) (Snapshot, error) {
	var s Snapshot
	_, err := c.doJSON(ctx, call{method: http.MethodGet, path: policyPath(policy, "snapshots", name), repeatable: true}, &s)
	return s, err
}

// DeleteSnapshot deletes a snapshot.
func (c *Client) DeleteSnapshot(ctx context.Context, policy, name string) error {
	_, err := c.doJSON(ctx, call{method: http.MethodDelete, path: policyPath(policy, "snapshots", name), repeatable: true}, nil)
	return err
}

// RestoreSnapshot makes a snapshot's table the policy's live table again.
func (c *Client) RestoreSnapshot(ctx context.Context, policy, name string) (TableChange, error) {
	var ch TableChange
	_, err := c.doJSON(ctx, call{method: http.MethodPost, path: policyPath(policy, "snapshots", name, "restore"), repeatable: true}, &ch)
	return ch, err
}

// readerOnly hides a reader's Close from the HTTP transport, which closes
// a request body that has one: the caller's file stays open for a retry,
// and for the caller to close.
type readerOnly struct{ io.Reader }

func decodeAnswer(resp *http.Response, out any) error {
	if err := json.NewDecoder(resp.Body).Decode(out); err != nil {
		return fmt.Errorf("%s %s: decode the answer: %w", resp.Request.Method, resp.Request.URL.Path, err)
	}
	return nil
}

// itoa formats an id for a path.
func itoa(id int64) string { return strconv.FormatInt(id, 10) }
