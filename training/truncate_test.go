package training

import (
	"strings"
	"testing"
	"unicode/utf8"
)

// A name quoted back in a message is shortened, never cut inside a
// character: "é" takes two bytes in UTF-8, and here the 64-byte cut falls
// between them.
func TestQuotedNameKeepsWholeCharacters(t *testing.T) {
	name := strings.Repeat("a", 63) + "é" + strings.Repeat("b", 10)
	got := Truncate(name, 64)
	if !utf8.ValidString(got) {
		t.Fatalf("shortened %q to %q, which is not valid UTF-8", name, got)
	}
	if !strings.HasPrefix(got, strings.Repeat("a", 63)) {
		t.Errorf("shortened %q to %q, which lost the name's start", name, got)
	}
}

// At every length, with characters of one to four bytes, Truncate keeps
// as many whole characters as fit, marks the cut, and leaves a string that
// fits alone.
func TestTruncateKeepsAsManyWholeCharactersAsFit(t *testing.T) {
	for _, s := range []string{"plain ascii name", "aéb€c😀d", "€€€€€", "😀😀😀", "mixé€😀"} {
		for limit := 0; limit <= len(s)+1; limit++ {
			got := Truncate(s, limit)
			if len(s) <= limit {
				if got != s {
					t.Errorf("Truncate(%q, %d) = %q, want it unchanged", s, limit, got)
				}
				continue
			}
			kept, ok := strings.CutSuffix(got, TruncateMarker)
			if !ok || !strings.HasPrefix(s, kept) || !utf8.ValidString(kept) || len(kept) > limit {
				t.Errorf("Truncate(%q, %d) = %q: want whole characters of at most %d bytes, then %q", s, limit, got, limit, TruncateMarker)
				continue
			}
			if _, size := utf8.DecodeRuneInString(s[len(kept):]); len(kept)+size <= limit {
				t.Errorf("Truncate(%q, %d) = %q left out a character that fits", s, limit, got)
			}
		}
	}
}
