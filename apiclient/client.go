// Package apiclient calls a running qtally over HTTP, for the command-line
// tools. Going through the API rather than the database means an operator
// needs no database credentials, and every change passes the same checks,
// locks and in-memory reloads as any other client's.
package apiclient

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"strings"
	"time"
)

// Client talks to one qtally API.
type Client struct {
	// BaseURL is the API's root, e.g. http://127.0.0.1:8080.
	BaseURL string
	// Token is the API token sent as a bearer token; empty for none.
	Token string
	HTTP  *http.Client
}

// New returns a client of the API at baseURL.
func New(baseURL, token string, timeout time.Duration) *Client {
	return &Client{BaseURL: strings.TrimRight(baseURL, "/"), Token: token, HTTP: &http.Client{Timeout: timeout}}
}

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

// ExportTable writes a policy's live table (snapshot "") or a snapshot to w.
func (c *Client) ExportTable(ctx context.Context, policy, snapshot string, format Format, w io.Writer) error {
	path := "/v1/policies/" + url.PathEscape(policy) + "/table"
	if snapshot != "" {
		path = "/v1/policies/" + url.PathEscape(policy) + "/snapshots/" + url.PathEscape(snapshot) + "/table"
	}
	resp, err := c.do(ctx, http.MethodGet, path+"?format="+string(format), "", nil)
	if err != nil {
		return err
	}
	defer resp.Body.Close()
	if _, err := io.Copy(w, resp.Body); err != nil {
		return fmt.Errorf("read the table: %w", err)
	}
	return nil
}

// ImportResult is the API's answer to an import.
type ImportResult struct {
	Policy   string `json:"policy"`
	Revision int64  `json:"revision"`
	Pairs    int    `json:"pairs"`
	// InitialQ is the policy's initial value after the import: the JSON
	// document's, or unchanged for CSV.
	InitialQ float64 `json:"initial_q"`
}

// ImportTable replaces a policy's live table with the table read from r.
func (c *Client) ImportTable(ctx context.Context, policy string, format Format, r io.Reader) (ImportResult, error) {
	var res ImportResult
	resp, err := c.do(ctx, http.MethodPut, "/v1/policies/"+url.PathEscape(policy)+"/table", format.mediaType(), r)
	if err != nil {
		return res, err
	}
	defer resp.Body.Close()
	if err := json.NewDecoder(resp.Body).Decode(&res); err != nil {
		return res, fmt.Errorf("read the answer: %w", err)
	}
	return res, nil
}

// problem is the part of an API problem answer worth showing.
type problem struct {
	Detail string `json:"detail"`
	Errors []struct {
		Field   string `json:"field"`
		Message string `json:"message"`
	} `json:"errors"`
}

// do sends a request and returns a 2xx answer; any other answer becomes
// an error carrying the API's explanation.
func (c *Client) do(ctx context.Context, method, path, contentType string, body io.Reader) (*http.Response, error) {
	req, err := http.NewRequestWithContext(ctx, method, c.BaseURL+path, body)
	if err != nil {
		return nil, fmt.Errorf("bad API URL %q: %w", c.BaseURL, err)
	}
	if contentType != "" {
		req.Header.Set("Content-Type", contentType)
	}
	if c.Token != "" {
		req.Header.Set("Authorization", "Bearer "+c.Token)
	}
	resp, err := c.HTTP.Do(req)
	if err != nil {
		return nil, fmt.Errorf("%s %s: %w", method, c.BaseURL+path, err)
	}
	if resp.StatusCode/100 == 2 {
		return resp, nil
	}
	defer resp.Body.Close()
	var p problem
	data, _ := io.ReadAll(io.LimitReader(resp.Body, 1<<20))
	if json.Unmarshal(data, &p) != nil || p.Detail == "" {
		return nil, fmt.Errorf("%s %s: %s", method, path, resp.Status)
	}
	msg := p.Detail
	for i, e := range p.Errors {
		if i == 5 {
			msg += fmt.Sprintf("\n  ... %d more", len(p.Errors)-i)
			break
		}
		msg += "\n  " + e.Field + ": " + e.Message
	}
	return nil, fmt.Errorf("%s %s: %s: %s", method, path, resp.Status, msg)
}
