package storage_test

import (
	"context"
	"errors"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/internal/access"
	"github.com/qtally/qtally/training"
)

// Page sessions: a signed-in id opens its token's pages until it ends or
// expires; an id the server did not sign is refused without a database
// read, so made-up cookies cost no query.
func TestPageSessionsLiveInTheDatabase(t *testing.T) {
	ctx := context.Background()
	db := openDB(t)
	const pepper = "pepper-of-this-test-0123456789abcdef"
	random := access.NewSecretPart()
	tok, err := db.CreateToken(ctx, access.TokenSpec{Label: "operator", Scopes: []access.Scope{access.ScopeAdmin}},
		access.NewTokenHasher(pepper).Digest(random))
	if err != nil {
		t.Fatal(err)
	}
	keyring := access.NewKeyring(db, pepper)
	if err = keyring.Reload(ctx); err != nil {
		t.Fatal(err)
	}
	sessions := access.PageSessions{Store: db, Tokens: keyring, Life: time.Hour, Key: access.SessionKey(pepper)}
	unauthenticated := func(what, id string, s access.PageSessions) {
		t.Helper()
		if _, tokenErr := s.Token(ctx, id); !errors.Is(tokenErr, training.ErrUnauthenticated) {
			t.Fatalf("%s: %v, want unauthenticated", what, tokenErr)
		}
	}

	open, err := sessions.Start(ctx, &tok)
	if err != nil {
		t.Fatal(err)
	}
	if strings.Contains(open.ID, random) {
		t.Fatal("the session id carries the token secret")
	}
	if got, tokenErr := sessions.Token(ctx, open.ID); tokenErr != nil || got.ID != tok.ID {
		t.Fatalf("open session: %v %v", got, tokenErr)
	}
	forged := strings.Repeat("A", len(open.ID))
	unauthenticated("made-up id", forged, sessions)
	other := sessions
	other.Key = access.SessionKey("another pepper, another service 0123")
	unauthenticated("id signed by another key", open.ID, other)

	expired := sessions
	expired.Life = -time.Minute
	old, err := expired.Start(ctx, &tok)
	if err != nil {
		t.Fatal(err)
	}
	unauthenticated("expired session", old.ID, sessions)

	if err = sessions.End(ctx, open.ID); err != nil {
		t.Fatal(err)
	}
	unauthenticated("ended session", open.ID, sessions)

	// With the database gone, a made-up id is still refused as such: no
	// query was needed to refuse it.
	live, err := sessions.Start(ctx, &tok)
	if err != nil {
		t.Fatal(err)
	}
	db.Close()
	unauthenticated("made-up id without a database", forged, sessions)
	if _, err := sessions.Token(ctx, live.ID); errors.Is(err, training.ErrUnauthenticated) || err == nil {
		t.Fatalf("a signed id without a database: %v, want a database error", err)
	}
}
