package api

import (
	"bytes"
	"fmt"
	"net/http"
	"strings"
	"time"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/training"
)

const (
	signInPath = "/sign-in"
	// pageCookie carries an admin token for the status pages. It is
	// HttpOnly and SameSite=Strict, and only page GETs read it, so it cannot
	// be used to change anything from another site.
	pageCookie     = "qtally_token"
	pageCookieLife = 12 * time.Hour
)

// isPageRequest is a browser reading a status page: a GET outside the API.
func isPageRequest(c echo.Context) bool {
	m := c.Request().Method
	return (m == http.MethodGet || m == http.MethodHead) && !strings.HasPrefix(c.Request().URL.Path, "/v1/")
}

type signInView struct {
	pageBase
	Message string
}

func renderSignIn(c echo.Context, status int, message string) error {
	var buf bytes.Buffer
	view := signInView{pageBase: pageBase{Title: "Sign in", Now: time.Now()}, Message: message}
	if err := pages["signin.html"].ExecuteTemplate(&buf, "layout.html", view); err != nil {
		return fmt.Errorf("render sign-in: %w", err)
	}
	c.Response().Header().Set("Cache-Control", "no-store")
	return c.HTMLBlob(status, buf.Bytes())
}

func handleSignInPage() echo.HandlerFunc {
	return func(c echo.Context) error { return renderSignIn(c, http.StatusOK, "") }
}

// handleSignIn checks a pasted admin token and keeps it in a cookie.
func handleSignIn(auth Authenticator) echo.HandlerFunc {
	return func(c echo.Context) error {
		secret := strings.TrimSpace(c.FormValue("token"))
		if secret == "" {
			return renderSignIn(c, http.StatusBadRequest, "Paste a token to sign in.")
		}
		tok, err := auth.Verify(c.Request().Context(), secret)
		if err != nil {
			return renderSignIn(c, http.StatusUnauthorized, "That token is not valid, or it was revoked.")
		}
		if err := tok.Authorize(training.ScopeAdmin, ""); err != nil {
			return renderSignIn(c, http.StatusForbidden, "The status pages need a token with the admin scope.")
		}
		c.SetCookie(&http.Cookie{Name: pageCookie, Value: secret, Path: "/", MaxAge: int(pageCookieLife.Seconds()),
			HttpOnly: true, Secure: c.IsTLS(), SameSite: http.SameSiteStrictMode})
		return c.Redirect(http.StatusSeeOther, "/")
	}
}
