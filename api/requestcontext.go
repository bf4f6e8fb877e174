package api

import (
	"sync"

	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/internal/access"
)

// requestContext is the echo context that a request's middleware and
// handler see: observe wraps echo's own in it. It carries what
// authentication found and the policies the request named, which echo's
// per-request store would hold in a fresh map (each value boxed) on every
// request; the wrappers themselves are pooled.
type requestContext struct {
	echo.Context
	token *access.Token
	// session: a page request authenticated by its sign-in session.
	session bool
	// policies are the policy names the request carried, the path's first.
	policies []string
}

var requestContexts = sync.Pool{New: func() any { return new(requestContext) }}

// wrapRequest takes a pooled requestContext around c; release returns it.
func wrapRequest(c echo.Context) *requestContext {
	rc := requestContexts.Get().(*requestContext)
	rc.Context = c
	return rc
}

// release forgets the request and returns rc to the pool; nothing may use
// rc afterwards.
func (rc *requestContext) release() {
	clear(rc.policies)
	*rc = requestContext{policies: rc.policies[:0]}
	requestContexts.Put(rc)
}

// stateOf is the requestContext of c; nil for a context observe did not
// wrap, which then carries no token and no names.
func stateOf(c echo.Context) *requestContext {
	rc, _ := c.(*requestContext)
	return rc
}
