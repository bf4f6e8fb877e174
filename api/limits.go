package api

import (
	"net/http"
	"net/netip"
	"sync"
	"time"

	"github.com/labstack/echo/v4"
	"golang.org/x/time/rate"
)

// bulkDeadline gives an authorised request that carries an episode batch or
// a whole table d to be read and answered, instead of the server's short
// read and write timeouts, which stay in force for everyone else (a client
// without a token cannot hold a connection this long).
func bulkDeadline(d time.Duration) echo.MiddlewareFunc {
	return func(next echo.HandlerFunc) echo.HandlerFunc {
		return func(c echo.Context) error {
			rc := http.NewResponseController(c.Response())
			deadline := time.Now().Add(d)
			// Errors mean the connection cannot take deadlines (HTTP/2 in
			// tests, say); the server's own timeouts then stay.
			_ = rc.SetReadDeadline(deadline)
			_ = rc.SetWriteDeadline(deadline)
			return next(c)
		}
	}
}

// addressLimiter gives each client address its own request budget, for
// work anyone can ask for without a token. It tracks at most maxAddresses
// budgets: when full it forgets the ones back to a full budget, and if all
// are in use a new address waits like an exhausted one (refusing is safe;
// growing without bound is not). IPv6 clients are counted per /64, the
// block one subscriber usually gets.
type addressLimiter struct {
	mu           sync.Mutex
	every        rate.Limit
	burst        int
	maxAddresses int
	budgets      map[netip.Prefix]*rate.Limiter
}

func newAddressLimiter(perMinute int, maxAddresses int) *addressLimiter {
	return &addressLimiter{every: rate.Limit(float64(perMinute) / 60), burst: max(perMinute, 1), maxAddresses: maxAddresses,
		budgets: map[netip.Prefix]*rate.Limiter{}}
}

// allow takes one attempt from the address's budget, or says how long
// until one is available.
func (l *addressLimiter) allow(address string) (time.Duration, bool) {
	key := addressKey(address)
	now := time.Now()
	l.mu.Lock()
	defer l.mu.Unlock()
	lim := l.budgets[key]
	if lim == nil {
		if len(l.budgets) >= l.maxAddresses {
			for k, b := range l.budgets {
				if b.TokensAt(now) >= float64(l.burst) {
					delete(l.budgets, k)
				}
			}
		}
		if len(l.budgets) >= l.maxAddresses {
			return time.Duration(float64(time.Second) / float64(l.every)), false
		}
		lim = rate.NewLimiter(l.every, l.burst)
		l.budgets[key] = lim
	}
	r := lim.ReserveN(now, 1)
	if wait := r.DelayFrom(now); wait > 0 {
		r.CancelAt(now)
		return wait, false
	}
	return 0, true
}

func addressKey(address string) netip.Prefix {
	a, err := netip.ParseAddr(address)
	if err != nil {
		// Not an address (a misconfigured proxy header): one shared budget.
		return netip.Prefix{}
	}
	a = a.Unmap()
	bits := 32
	if a.Is6() {
		bits = 64
	}
	p, _ := a.Prefix(bits)
	return p
}
