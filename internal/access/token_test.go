package access

import (
	"crypto/hmac"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"strings"
	"testing"

	"github.com/qtally/qtally/training"
)

func TestSecretsRoundTripAndRejectLookalikes(t *testing.T) {
	random := NewSecretPart()
	if len(random) != 43 || NewSecretPart() == random {
		t.Fatalf("random part %q: want 43 fresh characters each time", random)
	}
	secret := FormatSecret(42, random)
	id, got, ok := ParseSecret(secret)
	if !ok || id != 42 || got != random {
		t.Fatalf("ParseSecret(%q) = %d, %q, %v", secret, id, got, ok)
	}
	for _, bad := range []string{
		"", "qtk_", "qtk_42", "qtk_42_", "qtk_42_" + random[:42], "qtk_42_" + random + "x",
		"qtk__" + random, "qtk_0_" + random, "qtk_042_" + random, "qtk_-1_" + random,
		"qtk_99999999999999999999_" + random, "QTK_42_" + random, "Bearer qtk_42_" + random,
	} {
		if _, _, ok := ParseSecret(bad); ok {
			t.Errorf("ParseSecret(%q) accepted a malformed secret", bad)
		}
	}
}

// The digest is HMAC-SHA-256 (RFC 2104 over FIPS 180-4), checked against
// the first test case of RFC 4231 section 4.2: key 0x0b x 20, data "Hi There".
func TestTokenDigestIsHMACSHA256(t *testing.T) {
	h := NewTokenHasher(strings.Repeat("\x0b", 20))
	want := "b0344c61d8db38535ca8afceaf0bf12b881dc200c9833da726e9376c2e32cff7"
	if got := hex.EncodeToString(h.Digest("Hi There")); got != want {
		t.Fatalf("digest %s, want %s (RFC 4231 test case 1)", got, want)
	}
	random := NewSecretPart()
	stored := h.Digest(random)
	if !h.Matches(stored, random) || h.Matches(stored, NewSecretPart()) {
		t.Fatal("Matches disagrees with Digest")
	}
	other := NewTokenHasher("another pepper")
	if other.Matches(stored, random) {
		t.Fatal("a digest made under one pepper matched under another")
	}
	plain := hmac.New(sha256.New, nil)
	plain.Write([]byte(random))
	if !NewTokenHasher("").Matches(plain.Sum(nil), random) {
		t.Fatal("without a pepper the digest is not HMAC with an empty key")
	}
}

func TestTokenAuthorize(t *testing.T) {
	limited := &Token{ID: 7, Scopes: []Scope{ScopeIngest, ScopeChoose}, Policies: []string{"checkout"}}
	all := &Token{ID: 8, Scopes: []Scope{ScopeAdmin}}
	for _, c := range []struct {
		tok    *Token
		scope  Scope
		policy string
		ok     bool
	}{
		{limited, ScopeIngest, "checkout", true},
		{limited, ScopeChoose, "checkout", true},
		{limited, ScopeChoose, "billing", false},
		{limited, ScopeAdmin, "checkout", false},
		{limited, ScopeChoose, "", true},
		{all, ScopeAdmin, "anything", true},
		{all, ScopeAdmin, "", true},
		{all, ScopeIngest, "anything", false},
	} {
		err := c.tok.Authorize(c.scope, c.policy)
		if (err == nil) != c.ok || (err != nil && !errors.Is(err, training.ErrForbidden)) {
			t.Errorf("token %d, %s on %q: %v, want allowed=%v", c.tok.ID, c.scope, c.policy, err, c.ok)
		}
	}
}

func TestTokenSpecValidate(t *testing.T) {
	good := TokenSpec{Label: "checkout front end", Scopes: []Scope{ScopeChoose}, Policies: []string{"checkout"}, RatePerSecond: 100, Burst: 200}
	if err := good.Validate(); err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		change func(*TokenSpec)
		field  string
	}{
		{func(s *TokenSpec) { s.Label = "" }, "label"},
		{func(s *TokenSpec) { s.Label = "line\nbreak" }, "label"},
		{func(s *TokenSpec) { s.Label = strings.Repeat("x", MaxTokenLabelLen+1) }, "label"},
		{func(s *TokenSpec) { s.Scopes = nil }, "scopes"},
		{func(s *TokenSpec) { s.Scopes = []Scope{"root"} }, "scopes"},
		{func(s *TokenSpec) { s.Scopes = []Scope{ScopeChoose, ScopeChoose} }, "scopes"},
		{func(s *TokenSpec) { s.Policies = []string{"../x"} }, "policies"},
		{func(s *TokenSpec) { s.RatePerSecond = -1 }, "rate"},
		{func(s *TokenSpec) { s.RatePerSecond, s.Burst = 0, 5 }, "burst"},
	} {
		spec := good
		spec.Scopes = append([]Scope(nil), good.Scopes...)
		c.change(&spec)
		var verr *training.ValidationError
		if err := spec.Validate(); !errors.As(err, &verr) || verr.Problems[0].Field != c.field {
			t.Errorf("%+v: %v, want a problem with %s", spec, err, c.field)
		}
	}
}

// The per-request cost of checking a secret against its stored digest.
func BenchmarkTokenMatches(b *testing.B) {
	h := NewTokenHasher("pepper")
	random := NewSecretPart()
	stored := h.Digest(random)
	b.ReportAllocs()
	b.RunParallel(func(pb *testing.PB) {
		for pb.Next() {
			if !h.Matches(stored, random) {
				b.Fatal("no match")
			}
		}
	})
}
