package api

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
	got := truncateParam(name)
	if !utf8.ValidString(got) {
		t.Fatalf("shortened %q to %q, which is not valid UTF-8", name, got)
	}
	if !strings.HasPrefix(got, strings.Repeat("a", 63)) {
		t.Errorf("shortened %q to %q, which lost the name's start", name, got)
	}
}
