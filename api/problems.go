package api

import (
	"bytes"
	"encoding/json"
	"fmt"
	"net/http"
	"net/url"
)

// DefaultProblemDocs is where qtally's problem types are documented unless
// Config.ProblemDocs says otherwise: docs/problems.md in the repository the
// module path names.
const DefaultProblemDocs = "https://github.com/qtally/qtally/blob/main/docs/problems.md"

// plainProblemType is the type of a problem that means no more than its
// HTTP status (RFC 9457, section 4.2.1); its title is the status phrase.
const plainProblemType = "about:blank"

// problemName names one of qtally's own problem types. Its type URI is the
// problem documentation's address, "#" and the name, so clients match on a
// stable string and a person who follows it reads what it means.
type problemName string

const (
	problemInvalidInput    problemName = "invalid-input"
	problemNotFound        problemName = "not-found"
	problemConflict        problemName = "conflict"
	problemUnauthenticated problemName = "unauthenticated"
	problemForbidden       problemName = "forbidden"
	problemUnavailable     problemName = "unavailable"
	problemQuotaExceeded   problemName = "quota-exceeded"
	// The two conditional-request problems of settings changes (RFC 9110
	// section 13.1.1 and RFC 6585 section 3).
	problemPreconditionFailed   problemName = "precondition-failed"
	problemPreconditionRequired problemName = "precondition-required"
	problemNoGreedyAnswer       problemName = "no-greedy-answer"
)

// problemDefinition is what every answer of one problem type carries.
type problemDefinition struct {
	title  string
	status int
}

var problemDefinitions = map[problemName]problemDefinition{
	problemInvalidInput:         {"Invalid input", http.StatusBadRequest},
	problemNotFound:             {"Not found", http.StatusNotFound},
	problemConflict:             {"Conflict", http.StatusConflict},
	problemUnauthenticated:      {"Unauthenticated", http.StatusUnauthorized},
	problemForbidden:            {"Forbidden", http.StatusForbidden},
	problemUnavailable:          {"Temporarily unavailable", http.StatusServiceUnavailable},
	problemQuotaExceeded:        {"Quota exceeded", http.StatusConflict},
	problemPreconditionFailed:   {"Precondition failed", http.StatusPreconditionFailed},
	problemPreconditionRequired: {"Precondition required", http.StatusPreconditionRequired},
	problemNoGreedyAnswer:       {"No greedy answer", http.StatusConflict},
}

// problemTypes makes problems whose type URIs lead to the documentation at
// docs.
type problemTypes struct {
	docs string
}

func (pt problemTypes) problem(name problemName, detail string) Problem {
	d := problemDefinitions[name]
	return Problem{Type: pt.docs + "#" + string(name), Title: d.title, Status: d.status, Detail: detail}
}

// CheckProblemDocs refuses an address that cannot carry the problem names
// as fragments.
func CheckProblemDocs(docs string) error {
	u, err := url.Parse(docs)
	if err != nil || (u.Scheme != "https" && u.Scheme != "http") || u.Host == "" || u.Fragment != "" || u.RawQuery != "" {
		return fmt.Errorf("want an absolute http(s) address without query or fragment, got %q", docs)
	}
	return nil
}

// openAPIDocument is OpenAPIDocument with its problem type URIs under docs.
func openAPIDocument(docs string) []byte {
	if docs == DefaultProblemDocs {
		return OpenAPIDocument
	}
	quoted, _ := json.Marshal(docs + "#") // a string always marshals
	return bytes.ReplaceAll(OpenAPIDocument, []byte(DefaultProblemDocs+"#"), quoted[1:len(quoted)-1])
}
