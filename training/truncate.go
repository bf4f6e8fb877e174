package training

import "unicode/utf8"

// TruncateMarker ends a value Truncate shortened.
const TruncateMarker = "..."

// Truncate shortens s, when it is longer than maxBytes, to at most
// maxBytes bytes followed by TruncateMarker, so that a message quoting what
// a client sent stays short. It cuts only between characters: a character
// that would not fit whole is left out.
func Truncate(s string, maxBytes int) string {
	if len(s) <= maxBytes {
		return s
	}
	n := max(maxBytes, 0)
	for n > 0 && !utf8.RuneStart(s[n]) {
		n--
	}
	return s[:n] + TruncateMarker
}
