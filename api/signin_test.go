package api

import (
	"crypto/sha256"
	"encoding/base64"
	"fmt"
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

// The sign-in limiter remembers a bounded number of addresses: a client
// with many addresses cannot grow it, and only gets refused; an IPv6
// client's /64 counts as one address.
func TestAddressLimiterStaysBounded(t *testing.T) {
	l := newAddressLimiter(2, 100)
	refused := 0
	for i := range 1000 {
		if _, ok := l.allow(fmt.Sprintf("10.%d.%d.1", i/256, i%256)); !ok {
			refused++
		}
	}
	if len(l.budgets) > 100 || refused != 900 {
		t.Fatalf("1000 addresses: %d budgets kept, %d refused; want at most 100 kept and 900 refused", len(l.budgets), refused)
	}
	v6 := newAddressLimiter(2, 100)
	for i, a := range []string{"2001:db8::1", "2001:db8::2", "2001:db8::3"} {
		if _, ok := v6.allow(a); ok != (i < 2) {
			t.Fatalf("attempt %d from one /64: allowed %v", i, ok)
		}
	}
	if _, ok := v6.allow("2001:db8:0:1::1"); !ok {
		t.Fatal("another /64 shared the budget")
	}
}
