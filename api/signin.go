package api

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/base64"
	"errors"
	"fmt"
	"math"
	"mime"
	"net/http"
	"net/url"
	"strconv"
	"strings"
	"time"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/internal/access"
)

// PageSessions keeps the status pages' sign-ins: the browser holds an
// opaque session id, never a token secret.
type PageSessions interface {
	Start(ctx context.Context, tok *access.Token) (access.PageSession, error)
	Token(ctx context.Context, id string) (*access.Token, error)
	End(ctx context.Context, id string) error
}

const (
	signInPath  = "/sign-in"
	signOutPath = "/sign-out"
	// sessionCookie carries a page session id. It is HttpOnly and
	// SameSite=Strict, and only page GETs read it, so another site can
	// neither read it nor use it to change anything.
	sessionCookie = "qtally_session"
	// legacyTokenCookie held a token secret before sessions; signing in or
	// out deletes it from the browser.
	legacyTokenCookie = "qtally_token"
	// signInMaxBodyBytes bounds a sign-in form: a token secret is under 100
	// bytes, and the form is read before anyone is authenticated.
	signInMaxBodyBytes = 4 << 10
)

// isPageRequest is a browser reading a status page: a GET outside the API.
func isPageRequest(c echo.Context) bool {
	m := c.Request().Method
	return (m == http.MethodGet || m == http.MethodHead) && !strings.HasPrefix(c.Request().URL.Path, "/v1/")
}

// pageSecurityHeaders keep the status pages inert in a browser: no script
// runs (the pages have none), only the layout's own style block applies,
// forms post only here, no other site may frame them, and no URL leaks in
// a Referer to another site ("no-referrer" would make browsers send
// "Origin: null" with the sign-in form, which the Origin check refuses).
func pageSecurityHeaders(c echo.Context) {
	h := c.Response().Header()
	h.Set("Content-Security-Policy", pageCSP)
	h.Set("X-Content-Type-Options", "nosniff")
	h.Set("X-Frame-Options", "DENY")
	h.Set("Referrer-Policy", "same-origin")
	h.Set("Cache-Control", "no-store")
}

// pageCSP allows nothing but the layout's own style block, by its hash.
var pageCSP = contentSecurityPolicy()

func contentSecurityPolicy() string {
	layout, err := pageFiles.ReadFile("pages/layout.html")
	if err != nil {
		panic(err) // embedded at build time
	}
	_, rest, _ := strings.Cut(string(layout), "<style>")
	style, _, _ := strings.Cut(rest, "</style>")
	sum := sha256.Sum256([]byte(style))
	return "default-src 'none'; style-src 'sha256-" + base64.StdEncoding.EncodeToString(sum[:]) + "'; " +
		"form-action 'self'; base-uri 'none'; frame-ancestors 'none'"
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
	pageSecurityHeaders(c)
	return c.HTMLBlob(status, buf.Bytes())
}

func handleSignInPage() echo.HandlerFunc {
	return func(c echo.Context) error { return renderSignIn(c, http.StatusOK, "") }
}

// signIn checks pasted admin tokens and opens page sessions.
type signIn struct {
	auth     Authenticator
	sessions PageSessions
	attempts *addressLimiter
	// trustedProxy tells whether a request came through the configured
	// TLS-terminating proxy: its cookies then get the Secure attribute.
	trustedProxy func(c echo.Context) bool
}

// handleSignIn opens a session for a pasted admin token. Before reading
// anything it checks the client address's attempt budget and where the
// form comes from; it reads at most signInMaxBodyBytes.
func (s *signIn) handleSignIn() echo.HandlerFunc {
	return func(c echo.Context) error {
		if wait, ok := s.attempts.allow(c.RealIP()); !ok {
			c.Response().Header().Set("Retry-After", strconv.Itoa(int(math.Ceil(wait.Seconds()))))
			return renderSignIn(c, http.StatusTooManyRequests, "Too many sign-in attempts from your address; wait a minute and try again.")
		}
		if !sameOrigin(c.Request()) {
			return renderSignIn(c, http.StatusForbidden, "This form was sent from another site; sign in from this page.")
		}
		secret, err := readSignInForm(c)
		if err != nil {
			var tooLarge *http.MaxBytesError
			if errors.As(err, &tooLarge) {
				return renderSignIn(c, http.StatusRequestEntityTooLarge, "The form is larger than a sign-in needs; paste only the token.")
			}
			return renderSignIn(c, http.StatusBadRequest, "The form could not be read; paste the token and try again.")
		}
		if secret == "" {
			return renderSignIn(c, http.StatusBadRequest, "Paste a token to sign in.")
		}
		tok, err := s.auth.Verify(c.Request().Context(), secret)
		if err != nil {
			return renderSignIn(c, http.StatusUnauthorized, "That token is not valid, or it was revoked.")
		}
		if err = tok.Authorize(access.ScopeAdmin, ""); err != nil {
			return renderSignIn(c, http.StatusForbidden, "The status pages need a token with the admin scope.")
		}
		session, err := s.sessions.Start(c.Request().Context(), tok)
		if err != nil {
			return err
		}
		c.SetCookie(&http.Cookie{Name: sessionCookie, Value: session.ID, Path: "/", Expires: session.Expires,
			MaxAge: int(time.Until(session.Expires).Seconds()), HttpOnly: true, Secure: s.secure(c), SameSite: http.SameSiteStrictMode})
		s.dropCookie(c, legacyTokenCookie)
		return c.Redirect(http.StatusSeeOther, "/")
	}
}

// handleSignOut ends the browser's session here and in the database.
func (s *signIn) handleSignOut() echo.HandlerFunc {
	return func(c echo.Context) error {
		if !sameOrigin(c.Request()) {
			return renderSignIn(c, http.StatusForbidden, "This form was sent from another site.")
		}
		if ck, err := c.Cookie(sessionCookie); err == nil {
			if err := s.sessions.End(c.Request().Context(), ck.Value); err != nil {
				return err
			}
		}
		s.dropCookie(c, sessionCookie)
		s.dropCookie(c, legacyTokenCookie)
		return c.Redirect(http.StatusSeeOther, signInPath)
	}
}

func (s *signIn) secure(c echo.Context) bool { return c.IsTLS() || s.trustedProxy(c) }

func (s *signIn) dropCookie(c echo.Context, name string) {
	c.SetCookie(&http.Cookie{Name: name, Value: "", Path: "/", MaxAge: -1, HttpOnly: true, Secure: s.secure(c),
		SameSite: http.SameSiteStrictMode})
}

// readSignInForm reads the token field of a form of at most
// signInMaxBodyBytes, URL-encoded or multipart.
func readSignInForm(c echo.Context) (string, error) {
	req := c.Request()
	req.Body = http.MaxBytesReader(c.Response(), req.Body, signInMaxBodyBytes)
	media, _, _ := mime.ParseMediaType(req.Header.Get(echo.HeaderContentType))
	var err error
	if media == echo.MIMEMultipartForm {
		err = req.ParseMultipartForm(signInMaxBodyBytes)
	} else {
		err = req.ParseForm()
	}
	if err != nil {
		return "", err
	}
	return strings.TrimSpace(req.PostForm.Get("token")), nil
}

// sameOrigin refuses forms another site made a browser send. Browsers send
// Origin with every POST; a client without one (curl) is no browser that a
// page could have driven, and without a valid token signing in gets it
// nothing.
func sameOrigin(r *http.Request) bool {
	origin := r.Header.Get("Origin")
	if origin == "" {
		site := r.Header.Get("Sec-Fetch-Site")
		return site == "" || site == "same-origin" || site == "none"
	}
	u, err := url.Parse(origin)
	return err == nil && (u.Scheme == "http" || u.Scheme == "https") && u.Host != "" && strings.EqualFold(u.Host, r.Host)
}
