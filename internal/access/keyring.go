package access

import (
	"context"
	"crypto/subtle"
	"fmt"
	"sync"
	"sync/atomic"

	"golang.org/x/time/rate"

	"github.com/qtally/qtally/training"
)

// TokenSource reads the tokens that are not revoked.
type TokenSource interface {
	ActiveTokens(ctx context.Context) ([]Token, error)
}

// Keyring is a process's in-memory copy of the active tokens, so that
// verifying a request costs a map lookup and a constant-time comparison,
// never a database round trip. The service reloads it when a token is created or
// revoked (a notification) and on a fixed interval, which bounds how long a
// revoked token keeps working even if the notification is missed. While the
// database cannot be reached the last copy stays in use.
type Keyring struct {
	source TokenSource
	hasher TokenHasher

	tokens     atomic.Pointer[map[int64]*keyEntry]
	reloadMu   sync.Mutex
	reloads    atomic.Uint64
	missMu     sync.Mutex
	missReload *rate.Limiter
}

// keyEntry is one active token in the copy.
type keyEntry struct {
	token *Token
	// verified is the random part last proven to match the digest: checking
	// a request against it costs far less than a MAC. It lives only as long
	// as this copy of the tokens, one refresh interval at most.
	verified atomic.Pointer[[]byte]
}

// missReloadsPerSecond bounds the reloads caused by secrets naming an id the
// copy lacks (a token created a moment ago), so that made-up ids cannot turn
// into database load.
const missReloadsPerSecond = 5

// NewKeyring returns an empty keyring; call Reload to fill it.
func NewKeyring(source TokenSource, pepper string) *Keyring {
	k := &Keyring{source: source, hasher: NewTokenHasher(pepper),
		missReload: rate.NewLimiter(missReloadsPerSecond, missReloadsPerSecond)}
	k.tokens.Store(&map[int64]*keyEntry{})
	return k
}

// Reload replaces the copy with the active tokens as stored now.
func (k *Keyring) Reload(ctx context.Context) error {
	k.reloadMu.Lock()
	defer k.reloadMu.Unlock()
	list, err := k.source.ActiveTokens(ctx)
	if err != nil {
		return fmt.Errorf("reload tokens: %w", err)
	}
	byID := make(map[int64]*keyEntry, len(list))
	for i := range list {
		byID[list[i].ID] = &keyEntry{token: &list[i]}
	}
	k.tokens.Store(&byID)
	k.reloads.Add(1)
	return nil
}

// Verify returns the active token a secret belongs to, or an
// ErrUnauthenticated error. Comparisons take constant time.
func (k *Keyring) Verify(ctx context.Context, secret string) (*Token, error) {
	id, random, ok := ParseSecret(secret)
	if !ok {
		return nil, training.Unauthenticatedf("the bearer token is not a qtally token secret (qtk_<id>_<43 characters>)")
	}
	e := (*k.tokens.Load())[id]
	if e == nil {
		var err error
		if e, err = k.lookupFresh(ctx, id); err != nil {
			return nil, err
		}
	}
	if e == nil {
		return nil, training.Unauthenticatedf("the token is unknown or revoked")
	}
	if v := e.verified.Load(); v != nil {
		var buf [64]byte
		if subtle.ConstantTimeCompare(*v, append(buf[:0], random...)) == 1 {
			return e.token, nil
		}
	}
	if !k.hasher.Matches(e.token.Digest, random) {
		return nil, training.Unauthenticatedf("the token is unknown or revoked")
	}
	proven := []byte(random)
	e.verified.Store(&proven)
	return e.token, nil
}

// lookupFresh reloads, within the miss budget, and looks the id up again.
// Concurrent misses share one reload.
func (k *Keyring) lookupFresh(ctx context.Context, id int64) (*keyEntry, error) {
	seen := k.reloads.Load()
	k.missMu.Lock()
	defer k.missMu.Unlock()
	if k.reloads.Load() == seen {
		if !k.missReload.Allow() {
			return nil, nil
		}
		if err := k.Reload(ctx); err != nil {
			return nil, err
		}
	}
	return (*k.tokens.Load())[id], nil
}

// Len is the number of active tokens in the copy.
func (k *Keyring) Len() int { return len(*k.tokens.Load()) }

// Active returns the active token with this id, or an ErrUnauthenticated
// error when it is unknown or revoked. Like Verify, a miss may reload the
// copy within the miss budget.
func (k *Keyring) Active(ctx context.Context, id int64) (*Token, error) {
	e := (*k.tokens.Load())[id]
	if e == nil {
		var err error
		if e, err = k.lookupFresh(ctx, id); err != nil {
			return nil, err
		}
	}
	if e == nil {
		return nil, training.Unauthenticatedf("the token of this session is unknown or revoked")
	}
	return e.token, nil
}
