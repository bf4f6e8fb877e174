package api

import (
	"crypto/sha256"
	"encoding/base64"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"

	"github.com/labstack/echo/v4"
)

// The pages' only style block is the one their Content-Security-Policy
// allows by hash, as rendered (a browser computes the hash the same way,
// over the element's text: CSP Level 3, "hash-source").
func TestPageStyleMatchesItsPolicyHash(t *testing.T) {
	e := echo.New()
	rec := httptest.NewRecorder()
	c := e.NewContext(httptest.NewRequest(http.MethodGet, "/sign-in", nil), rec)
	if err := renderSignIn(c, http.StatusOK, ""); err != nil {
		t.Fatal(err)
	}
	body := rec.Body.String()
	if strings.Count(body, "<style>") != 1 || strings.Contains(body, "<script") || strings.Contains(body, " style=") {
		t.Fatalf("the page has other than one style block and no script:\n%s", body)
	}
	_, rest, _ := strings.Cut(body, "<style>")
	style, _, _ := strings.Cut(rest, "</style>")
	sum := sha256.Sum256([]byte(style))
	want := "style-src 'sha256-" + base64.StdEncoding.EncodeToString(sum[:]) + "'"
	if csp := rec.Header().Get("Content-Security-Policy"); !strings.Contains(csp, want) {
		t.Fatalf("Content-Security-Policy %q does not allow the rendered style (%s)", csp, want)
	}
}
