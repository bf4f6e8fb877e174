package training

import (
	"crypto/hmac"
	"crypto/rand"
	"crypto/sha256"
	"encoding/base64"
	"hash"
	"math"
	"slices"
	"strconv"
	"strings"
	"sync"
	"time"
)

// Scope is one kind of thing a token may do.
type Scope string

const (
	// ScopeIngest allows posting episodes.
	ScopeIngest Scope = "ingest"
	// ScopeChoose allows asking for actions and reading states' estimates.
	ScopeChoose Scope = "choose"
	// ScopeAdmin allows creating, changing and reading policies.
	ScopeAdmin Scope = "admin"
)

// AllScopes lists every scope, in the order they are shown.
var AllScopes = []Scope{ScopeIngest, ScopeChoose, ScopeAdmin}

// Token is an API credential as stored: everything but its secret.
type Token struct {
	ID     int64   `json:"id"`
	Label  string  `json:"label"`
	Scopes []Scope `json:"scopes"`
	// Policies are the only policies the token may act on; empty: all.
	Policies []string `json:"policies,omitempty"`
	// RatePerSecond and Burst bound the token's requests; 0: the server's default.
	RatePerSecond float64    `json:"rate_per_second,omitempty"`
	Burst         int        `json:"burst,omitempty"`
	CreatedAt     time.Time  `json:"created_at"`
	RevokedAt     *time.Time `json:"revoked_at,omitempty"`
	// Digest is the keyed hash of the secret's random part.
	Digest []byte `json:"-"`
}

// HasScope reports whether the token carries s.
func (t *Token) HasScope(s Scope) bool { return slices.Contains(t.Scopes, s) }

// CoversPolicy reports whether the token may act on the named policy.
func (t *Token) CoversPolicy(name string) bool {
	return len(t.Policies) == 0 || slices.Contains(t.Policies, name)
}

// Authorize says whether the token may use scope s on a policy ("" when the
// request names none), as an ErrForbidden error when it may not.
func (t *Token) Authorize(s Scope, policy string) error {
	if !t.HasScope(s) {
		return Forbiddenf("token %d lacks the %s scope that this request needs", t.ID, s)
	}
	if policy != "" {
		return t.AuthorizePolicy(policy)
	}
	return nil
}

// AuthorizePolicy says whether the token may act on the policy a request's
// path names. The answer is the same whether that policy exists or not.
func (t *Token) AuthorizePolicy(policy string) error {
	if !t.CoversPolicy(policy) {
		return Forbiddenf("token %d is limited to other policies than %q", t.ID, Truncate(policy, 64))
	}
	return nil
}

// AuthorizeNamed says whether the token may act on a policy that a request
// names in field (a query parameter or a body field) besides its path. The
// answer is the same whether that policy exists or not.
func (t *Token) AuthorizeNamed(field, policy string) error {
	if !t.CoversPolicy(policy) {
		return Forbiddenf("token %d is limited to other policies than %q, which %s names", t.ID, Truncate(policy, 64), field)
	}
	return nil
}

// TokenSpec is what a new token is created with.
type TokenSpec struct {
	Label         string
	Scopes        []Scope
	Policies      []string
	RatePerSecond float64
	Burst         int
}

// MaxTokenLabelLen bounds a token's label.
const MaxTokenLabelLen = 200

// Validate reports every problem of a token request.
func (s TokenSpec) Validate() error {
	var l problemList
	switch {
	case s.Label == "":
		l.add(-1, -1, "label", "is missing; say what the token is for")
	case len(s.Label) > MaxTokenLabelLen:
		l.add(-1, -1, "label", "is %d bytes, longer than the limit of %d", len(s.Label), MaxTokenLabelLen)
	case !printableName(s.Label):
		l.add(-1, -1, "label", "must be valid UTF-8 without control characters")
	}
	if len(s.Scopes) == 0 {
		l.add(-1, -1, "scopes", "must name at least one of %s", joinScopes(AllScopes))
	}
	for i, sc := range s.Scopes {
		if !slices.Contains(AllScopes, sc) {
			l.add(-1, -1, "scopes", "%q is not a scope; scopes are %s", Truncate(string(sc), 64), joinScopes(AllScopes))
		} else if slices.Index(s.Scopes, sc) < i {
			l.add(-1, -1, "scopes", "repeats %q", sc)
		}
	}
	for _, p := range s.Policies {
		if ValidatePolicyName(p) != nil {
			l.add(-1, -1, "policies", "%q is not a valid policy name", Truncate(p, 64))
		}
	}
	if math.IsNaN(s.RatePerSecond) || math.IsInf(s.RatePerSecond, 0) || s.RatePerSecond < 0 {
		l.add(-1, -1, "rate", "must be a finite number of requests per second, at least 0")
	}
	switch {
	case s.Burst < 0:
		l.add(-1, -1, "burst", "must be at least 0")
	case s.Burst > 0 && s.RatePerSecond == 0:
		l.add(-1, -1, "burst", "applies only together with a rate")
	}
	return l.err()
}

func joinScopes(scopes []Scope) string {
	names := make([]string, len(scopes))
	for i, s := range scopes {
		names[i] = string(s)
	}
	return strings.Join(names, ", ")
}

// A secret reads qtk_<token id>_<43 base64url characters>: the id says
// which stored digest to compare with, the rest is 256 random bits.
const (
	secretPrefix      = "qtk_"
	secretRandomBytes = 32
)

var secretEncoding = base64.RawURLEncoding

// NewSecretPart returns the random part of a new secret.
func NewSecretPart() string {
	b := make([]byte, secretRandomBytes)
	_, _ = rand.Read(b) // crypto/rand.Read never fails (Go 1.24+)
	return secretEncoding.EncodeToString(b)
}

// FormatSecret joins a token id and the random part into the secret a client sends.
func FormatSecret(id int64, random string) string {
	return secretPrefix + strconv.FormatInt(id, 10) + "_" + random
}

// ParseSecret splits a secret into its token id and random part.
func ParseSecret(secret string) (id int64, random string, ok bool) {
	rest, ok := strings.CutPrefix(secret, secretPrefix)
	if !ok {
		return 0, "", false
	}
	idText, random, ok := strings.Cut(rest, "_")
	if !ok || len(random) != secretEncoding.EncodedLen(secretRandomBytes) || len(idText) == 0 || len(idText) > 18 {
		return 0, "", false
	}
	id, err := strconv.ParseInt(idText, 10, 64)
	if err != nil || id < 1 || idText[0] == '0' {
		return 0, "", false
	}
	return id, random, true
}

// TokenHasher makes the stored digest of a secret's random part: an
// HMAC-SHA-256 keyed with the server's pepper (empty when none is set), so
// that a copy of the database alone cannot be used to test guesses.
type TokenHasher struct {
	pool *sync.Pool
}

// macScratch is a keyed MAC with buffers, reused across requests so that
// checking a secret allocates nothing.
type macScratch struct {
	mac hash.Hash
	in  []byte
	sum [sha256.Size]byte
}

// NewTokenHasher returns a hasher keyed with pepper.
func NewTokenHasher(pepper string) TokenHasher {
	key := []byte(pepper)
	return TokenHasher{pool: &sync.Pool{New: func() any { return &macScratch{mac: hmac.New(sha256.New, key)} }}}
}

// Digest hashes the random part of a secret.
func (h TokenHasher) Digest(random string) []byte {
	var out []byte
	h.with(random, func(sum []byte) { out = append([]byte(nil), sum...) })
	return out
}

// Matches compares a stored digest with the one of a presented random part
// in constant time.
func (h TokenHasher) Matches(stored []byte, random string) bool {
	var ok bool
	h.with(random, func(sum []byte) { ok = hmac.Equal(stored, sum) })
	return ok
}

func (h TokenHasher) with(random string, use func(sum []byte)) {
	s := h.pool.Get().(*macScratch)
	s.mac.Reset()
	s.in = append(s.in[:0], random...)
	s.mac.Write(s.in)
	use(s.mac.Sum(s.sum[:0]))
	h.pool.Put(s)
}
