package access

import (
	"context"
	"crypto/hmac"
	"crypto/rand"
	"crypto/sha256"
	"errors"
	"time"

	"github.com/qtally/qtally/training"
)

// A page session stands for a signed-in browser. Its id is 256 random bits
// and a MAC of them under the server's key, which the browser keeps in a
// cookie: a made-up id is refused without a database read. The store keeps
// only the id's SHA-256 (a copy of the database cannot be replayed as a
// session), the token it was opened with and when it expires. The token's
// secret never leaves the sign-in request.
const (
	sessionRandomBytes = 32
	sessionMACBytes    = 16
)

// SessionStore keeps page sessions.
type SessionStore interface {
	// CreateSession stores a session and drops expired ones.
	CreateSession(ctx context.Context, digest []byte, tokenID int64, expires time.Time) error
	// SessionTokenID returns the token of an unexpired session, or training.ErrNotFound.
	SessionTokenID(ctx context.Context, digest []byte) (int64, error)
	// DeleteSession ends a session; ending an unknown one is no error.
	DeleteSession(ctx context.Context, digest []byte) error
}

// PageSessions opens, checks and ends page sessions.
type PageSessions struct {
	Store SessionStore
	// Tokens are the active tokens: a session ends when its token is revoked.
	Tokens *Keyring
	// Life is how long a session lasts from sign-in; it is not extended.
	Life time.Duration
	// Key signs session ids; every API process must use the same.
	Key []byte
}

// SessionKey derives the session signing key from the token pepper, so
// that processes sharing tokens share sessions without another secret.
func SessionKey(pepper string) []byte {
	mac := hmac.New(sha256.New, []byte(pepper))
	mac.Write([]byte("qtally page sessions"))
	return mac.Sum(nil)
}

func (p PageSessions) tag(random []byte) []byte {
	mac := hmac.New(sha256.New, p.Key)
	mac.Write(random)
	return mac.Sum(nil)[:sessionMACBytes]
}

// PageSession is an opened session: the id to give the browser, once.
type PageSession struct {
	ID      string
	Expires time.Time
}

// Start opens a session for a verified token.
func (p PageSessions) Start(ctx context.Context, tok *Token) (PageSession, error) {
	b := make([]byte, sessionRandomBytes)
	_, _ = rand.Read(b) // crypto/rand.Read never fails (Go 1.24+)
	s := PageSession{ID: secretEncoding.EncodeToString(append(b, p.tag(b)...)), Expires: time.Now().Add(p.Life)}
	if err := p.Store.CreateSession(ctx, sessionDigest(s.ID), tok.ID, s.Expires); err != nil {
		return PageSession{}, err
	}
	return s, nil
}

// Token returns the active token of an unexpired session, or an
// ErrUnauthenticated error.
func (p PageSessions) Token(ctx context.Context, id string) (*Token, error) {
	raw, err := secretEncoding.DecodeString(id)
	if err != nil || len(raw) != sessionRandomBytes+sessionMACBytes ||
		!hmac.Equal(raw[sessionRandomBytes:], p.tag(raw[:sessionRandomBytes])) {
		return nil, training.Unauthenticatedf("the session is unknown or expired; sign in again")
	}
	tokenID, err := p.Store.SessionTokenID(ctx, sessionDigest(id))
	if err != nil {
		if errors.Is(err, training.ErrNotFound) {
			return nil, training.Unauthenticatedf("the session is unknown or expired; sign in again")
		}
		return nil, err
	}
	return p.Tokens.Active(ctx, tokenID)
}

// End ends a session.
func (p PageSessions) End(ctx context.Context, id string) error {
	return p.Store.DeleteSession(ctx, sessionDigest(id))
}

func sessionDigest(id string) []byte {
	sum := sha256.Sum256([]byte(id))
	return sum[:]
}
