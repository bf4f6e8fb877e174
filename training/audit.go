package training

import "time"

// Where an audited action came from.
const (
	AuditViaAPI         = "api"
	AuditViaCommandLine = "command line"
)

// AuditEntry is one admin action: who, what, on which policy, when, and
// how it ended.
type AuditEntry struct {
	ID  int64     `json:"id"`
	At  time.Time `json:"at"`
	Via string    `json:"via"`
	// TokenID is the token the request carried; nil from the command line
	// and when the API runs without tokens.
	TokenID    *int64 `json:"token_id,omitempty"`
	TokenLabel string `json:"token_label"`
	// Method and Route are the HTTP method and route pattern, or the command.
	Method string `json:"method"`
	Route  string `json:"route"`
	// Path is the request's path and query as sent.
	Path string `json:"path"`
	// Policy is the path's policy; PoliciesNamed every policy the request
	// named (path, query and body).
	Policy        string   `json:"policy,omitempty"`
	PoliciesNamed []string `json:"policies_named"`
	// Object is what the action created or changed when the path does not
	// say: the Location of a new object, or "token <id>".
	Object string `json:"object,omitempty"`
	// Status is the HTTP status of the answer.
	Status int `json:"status"`
}

// Audit log paging.
const (
	DefaultAuditLimit = 100
	MaxAuditLimit     = 1000
)

// AuditQuery selects a page of the audit log, newest first.
type AuditQuery struct {
	// Policy keeps the entries of one policy; empty: every entry.
	Policy string
	// Before keeps entries older than this id; 0: from the newest.
	Before int64
	Limit  int
	// Visible, when not nil, keeps only entries whose every named policy
	// is in it: a token limited to some policies sees only their entries.
	Visible []string
}

// AuditPage is a page of the audit log; NextBefore, when set, is the
// Before of the next page.
type AuditPage struct {
	Entries    []AuditEntry `json:"entries"`
	NextBefore *int64       `json:"next_before,omitempty"`
}

// MaxAuditPathLen bounds the request path an entry keeps.
const MaxAuditPathLen = 2048

// TruncateAuditPath shortens a path for the audit log.
func TruncateAuditPath(path string) string { return Truncate(path, MaxAuditPathLen) }
