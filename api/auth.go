package api

import (
	"context"
	"errors"
	"math"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/labstack/echo/v4"
	"golang.org/x/time/rate"

	"github.com/qtally/qtally/internal/access"
	"github.com/qtally/qtally/training"
)

// Authenticator verifies bearer secrets.
type Authenticator interface {
	Verify(ctx context.Context, secret string) (*access.Token, error)
}

// RateConfig is the request rate a token gets unless it sets its own.
type RateConfig struct {
	// PerSecond is the sustained rate; 0 turns the limit off.
	PerSecond float64
	Burst     int
}

// guard authenticates and rate-limits every request but the health and
// metrics ones, and checks each route's scope. A nil guard lets all through.
type guard struct {
	auth     Authenticator
	sessions PageSessions
	rate     RateConfig
	limiters sync.Map // token id -> *rate.Limiter
}

func newGuard(auth Authenticator, sessions PageSessions, rc RateConfig) *guard {
	if auth == nil {
		return nil
	}
	return &guard{auth: auth, sessions: sessions, rate: rc}
}

const bearerRealm = `Bearer realm="qtally"`

// openRoutes answer without a token: probes and scrapers carry none, and
// the sign-in page is how a browser gets one.
var openRoutes = map[string]bool{"/livez": true, "/readyz": true, "/metrics": true, signInPath: true, signOutPath: true}

// authenticate runs for every request, matched route or not, so that a
// route added without a scope still needs a valid token.
func (g *guard) authenticate(next echo.HandlerFunc) echo.HandlerFunc {
	if g == nil {
		return next
	}
	return func(c echo.Context) error {
		if openRoutes[c.Path()] {
			return next(c)
		}
		header := c.Request().Header.Get(echo.HeaderAuthorization)
		var tok *access.Token
		if header == "" && isPageRequest(c) {
			// A browser cannot send a bearer header: status pages take the
			// token of the session that signing in opened.
			ck, err := c.Cookie(sessionCookie)
			if err != nil {
				return c.Redirect(http.StatusSeeOther, signInPath)
			}
			if tok, err = g.sessions.Token(c.Request().Context(), ck.Value); errors.Is(err, training.ErrUnauthenticated) {
				return c.Redirect(http.StatusSeeOther, signInPath)
			} else if err != nil {
				return err
			}
			if rc := stateOf(c); rc != nil {
				rc.session = true
			}
		} else {
			scheme, secret, found := strings.Cut(header, " ")
			if !found || !strings.EqualFold(scheme, "Bearer") || secret == "" {
				c.Response().Header().Set(echo.HeaderWWWAuthenticate, bearerRealm)
				return training.Unauthenticatedf("this request needs a token: send Authorization: Bearer <secret>")
			}
			var err error
			if tok, err = g.auth.Verify(c.Request().Context(), strings.TrimSpace(secret)); err != nil {
				c.Response().Header().Set(echo.HeaderWWWAuthenticate, bearerRealm+`, error="invalid_token"`)
				return err
			}
		}
		if wait, ok := g.allow(tok); !ok {
			c.Response().Header().Set("Retry-After", strconv.Itoa(int(math.Ceil(wait.Seconds()))))
			return echo.NewHTTPError(http.StatusTooManyRequests,
				"token "+strconv.FormatInt(tok.ID, 10)+" is over its request rate; retry after the time in Retry-After")
		}
		if rc := stateOf(c); rc != nil {
			rc.token = tok
		}
		return next(c)
	}
}

// allow takes one request from the token's budget, or says how long until
// one is available.
func (g *guard) allow(tok *access.Token) (time.Duration, bool) {
	perSecond, burst := g.rate.PerSecond, g.rate.Burst
	if tok.RatePerSecond > 0 {
		perSecond, burst = tok.RatePerSecond, tok.Burst
	}
	if perSecond <= 0 {
		return 0, true
	}
	l, ok := g.limiters.Load(tok.ID)
	if !ok {
		l, _ = g.limiters.LoadOrStore(tok.ID, rate.NewLimiter(rate.Limit(perSecond), max(burst, 1)))
	}
	lim := l.(*rate.Limiter)
	now := time.Now()
	r := lim.ReserveN(now, 1)
	if wait := r.DelayFrom(now); wait > 0 {
		r.CancelAt(now)
		return wait, false
	}
	return 0, true
}

// requireScope lets a request through only when its token has one of the
// scopes (the first is the one a refusal names). The policies it names are
// authorised for every request, in access.go.
func (g *guard) requireScope(scopes ...access.Scope) echo.MiddlewareFunc {
	return func(next echo.HandlerFunc) echo.HandlerFunc {
		if g == nil {
			return next
		}
		return func(c echo.Context) error {
			tok := requestToken(c)
			if tok == nil {
				return training.Unauthenticatedf("this request needs a token")
			}
			s := scopes[0]
			for _, other := range scopes[1:] {
				if !tok.HasScope(s) && tok.HasScope(other) {
					s = other
				}
			}
			if err := tok.Authorize(s, ""); err != nil {
				c.Response().Header().Set(echo.HeaderWWWAuthenticate,
					bearerRealm+`, error="insufficient_scope", scope="`+string(s)+`"`)
				return err
			}
			return next(c)
		}
	}
}

// requestToken is the verified token of a request; nil when auth is off.
func requestToken(c echo.Context) *access.Token {
	if rc := stateOf(c); rc != nil {
		return rc.token
	}
	return nil
}

// inSession tells whether a page request was authenticated by a session.
func inSession(c echo.Context) bool {
	rc := stateOf(c)
	return rc != nil && rc.session
}
