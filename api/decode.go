package api

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"mime"
	"net/http"
	"reflect"
	"slices"
	"strings"
	"unicode/utf8"

	jsonv2 "github.com/go-json-experiment/json"
	"github.com/labstack/echo/v4"

	"github.com/qtally/qtally/training"
)

const (
	mediaJSON   = "application/json"
	mediaNDJSON = "application/x-ndjson"
)

// readBody reads a request body of an accepted media type, within limit.
func readBody(c echo.Context, limit int64, accepted ...string) ([]byte, string, error) {
	req := c.Request()
	media, err := mediaType(req.Header.Get(echo.HeaderContentType))
	if err != nil || !contains(accepted, media) {
		return nil, "", echo.NewHTTPError(http.StatusUnsupportedMediaType,
			fmt.Sprintf("Content-Type must be %s", strings.Join(accepted, " or ")))
	}
	body, err := io.ReadAll(http.MaxBytesReader(c.Response(), req.Body, limit))
	var tooLarge *http.MaxBytesError
	if errors.As(err, &tooLarge) {
		return nil, "", echo.NewHTTPError(http.StatusRequestEntityTooLarge,
			fmt.Sprintf("the body is larger than the limit of %d bytes; send fewer episodes per request", limit))
	}
	if err != nil {
		return nil, "", echo.NewHTTPError(http.StatusBadRequest, "the body could not be read: "+err.Error())
	}
	return body, media, nil
}

// mediaType is mime.ParseMediaType's media type, without parsing the two
// plain values clients send on nearly every request.
func mediaType(header string) (string, error) {
	if header == mediaJSON || header == mediaNDJSON {
		return header, nil
	}
	media, _, err := mime.ParseMediaType(header)
	return media, err
}

func contains(list []string, s string) bool {
	for _, x := range list {
		if x == s {
			return true
		}
	}
	return false
}

// bindJSON reads a JSON body within limit and decodes it strictly into v,
// which may hold defaults for the fields a client leaves out, and
// authorises every policy it names (access.go).
func bindJSON(c echo.Context, limit int64, v any) error {
	body, _, err := readBody(c, limit, mediaJSON)
	if err != nil {
		return err
	}
	if err := decodeStrict(body, v, -1); err != nil {
		return err
	}
	return authorizeBodyNames(c, v)
}

// decodeStrict decodes exactly one JSON value into v, refusing unknown
// fields and trailing data, and explains any failure in client terms.
func decodeStrict(data []byte, v any, episode int) error {
	// The decoder would silently turn invalid UTF-8 into U+FFFD, storing a
	// name other than the one the client sent.
	if !utf8.Valid(data) {
		return training.Invalid(episode, -1, invalidUTF8Field(data), "contains bytes that are not valid UTF-8")
	}
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(v); err != nil {
		return jsonProblem(err, data, episode)
	}
	if _, err := dec.Token(); !errors.Is(err, io.EOF) {
		return training.Invalid(episode, -1, "", "unexpected data after the JSON value at byte offset %d", dec.InputOffset())
	}
	return nil
}

// fastOptions make the faster decoder as strict as decodeStrict.
var fastOptions = jsonv2.RejectUnknownMembers(true)

// decodeFast is decodeStrict for the hot paths (episodes, choose): it tries
// a decoder about twice as fast first. That decoder refuses duplicate
// names, names in another letter case and invalid UTF-8, which
// encoding/json accepts, and on null it zeroes a field where encoding/json
// keeps the field's default. So it is used only on bodies without a null,
// and anything it refuses is decoded afresh by decodeStrict, whose result or
// error is the answer: for every body, the outcome is decodeStrict's.
func decodeFast[T any](data []byte, v *T, episode int) error {
	initial := *v
	if !bytes.Contains(data, []byte("null")) && jsonv2.Unmarshal(data, v, fastOptions) == nil {
		return nil
	}
	*v = initial
	return decodeStrict(data, v, episode)
}

// jsonProblem turns a decoding error into a validation error located at
// an episode (or -1) and a field where the decoder says which.
func jsonProblem(err error, data []byte, episode int) error {
	var syntax *json.SyntaxError
	var typeErr *json.UnmarshalTypeError
	switch {
	case errors.As(err, &syntax):
		if word, ok := nonFiniteLiteral(data, syntax.Offset); ok {
			return training.Invalid(episode, -1, "", "%s at byte offset %d: NaN and infinities are not numbers in JSON; send finite numbers", word, syntax.Offset)
		}
		return training.Invalid(episode, -1, "", "malformed JSON at byte offset %d: %s", syntax.Offset, syntax.Error())
	case errors.Is(err, io.EOF):
		return training.Invalid(episode, -1, "", "the body is empty")
	case errors.Is(err, io.ErrUnexpectedEOF):
		return training.Invalid(episode, -1, "", "the JSON ends before it is complete (truncated body)")
	case errors.As(err, &typeErr):
		field := typeErr.Field
		if i := strings.LastIndexByte(field, '.'); i >= 0 {
			field = field[i+1:]
		}
		want := jsonKind(typeErr.Type)
		if number, ok := strings.CutPrefix(typeErr.Value, "number "); ok && want == "a number" {
			return training.Invalid(episode, -1, field, "the number %s is out of range", truncateBytes(number, 64))
		}
		got, _, _ := strings.Cut(typeErr.Value, " ")
		return training.Invalid(episode, -1, field, "expected %s, got %s", want, jsonKind(got))
	case strings.HasPrefix(err.Error(), "json: unknown field "):
		return training.Invalid(episode, -1, "", "%s is not a field of this request", truncateBytes(strings.TrimPrefix(err.Error(), "json: unknown field "), 64))
	default:
		return training.Invalid(episode, -1, "", "the JSON could not be decoded: %s", err.Error())
	}
}

// jsonKind names, in JSON's terms, a Go type or a kind of JSON value as
// the decoder reports them.
func jsonKind(t any) string {
	var kind string
	switch t := t.(type) {
	case reflect.Type:
		for t.Kind() == reflect.Pointer {
			t = t.Elem()
		}
		kind = t.Kind().String()
	case string:
		kind = t
	}
	switch kind {
	case "float32", "float64", "number":
		return "a number"
	case "int", "int8", "int16", "int32", "int64", "uint", "uint8", "uint16", "uint32", "uint64":
		return "an integer"
	case "string":
		return "a string"
	case "bool":
		return "true or false"
	case "slice", "array":
		return "an array"
	case "struct", "map", "object":
		return "an object"
	}
	return kind
}

// nonFiniteLiteral finds the word around a syntax error's offset and says
// whether it spells NaN or an infinity, as some encoders write non-finite
// floats.
func nonFiniteLiteral(data []byte, offset int64) (string, bool) {
	isWordByte := func(b byte) bool { return b == '-' || b == '+' || (b|0x20 >= 'a' && b|0x20 <= 'z') }
	start := int(min(max(offset, 0), int64(len(data))))
	for start > 0 && isWordByte(data[start-1]) {
		start--
	}
	end := start
	for end < len(data) && isWordByte(data[end]) {
		end++
	}
	if end-start > len("-Infinity") {
		return "", false
	}
	word := string(data[start:end])
	switch strings.ToLower(strings.TrimLeft(word, "+-")) {
	case "nan", "inf", "infinity":
		return word, true
	}
	return "", false
}

// invalidUTF8Field names the first member (in name order) of a JSON object
// whose value holds invalid UTF-8; "" when data is no object or the bytes
// are in a member's name.
func invalidUTF8Field(data []byte) string {
	var members map[string]json.RawMessage
	if json.Unmarshal(data, &members) != nil {
		return ""
	}
	var bad []string
	for name, value := range members {
		if !utf8.Valid(value) {
			bad = append(bad, name)
		}
	}
	slices.Sort(bad)
	if len(bad) == 0 {
		return ""
	}
	return bad[0]
}

// truncateBytes shortens what a message echoes of a request to about n
// bytes, at a character boundary.
func truncateBytes(s string, n int) string {
	if len(s) <= n {
		return s
	}
	for n > 0 && !utf8.RuneStart(s[n]) {
		n--
	}
	return s[:n] + "..."
}

// locateEpisodeError decodes one episode again, step by step, to say which
// step a decoding error is in. It runs only on the error path.
func locateEpisodeError(raw []byte, episode int) error {
	var ep training.Episode
	err := decodeStrict(raw, &ep, episode)
	if err == nil {
		return nil
	}
	var loose struct {
		Steps []json.RawMessage `json:"steps"`
	}
	if json.Unmarshal(raw, &loose) != nil {
		return err
	}
	for j, rawStep := range loose.Steps {
		var st training.Step
		if serr := decodeStrict(rawStep, &st, episode); serr != nil {
			var verr *training.ValidationError
			if errors.As(serr, &verr) {
				verr.Problems[0].Step = j
			}
			return serr
		}
	}
	return err
}

// locateBatchError finds the episode (and step) a batch decoding error is in.
func locateBatchError(body []byte, err error) error {
	var loose struct {
		Episodes []json.RawMessage `json:"episodes"`
	}
	if json.Unmarshal(body, &loose) != nil {
		return err
	}
	for i, raw := range loose.Episodes {
		if eerr := locateEpisodeError(raw, i); eerr != nil {
			return eerr
		}
	}
	return err
}

type episodesBody struct {
	Episodes []training.Episode `json:"episodes"`
}

// decodeEpisodes reads a JSON batch or NDJSON (one episode object a line).
func decodeEpisodes(body []byte, media string) ([]training.Episode, error) {
	if media == mediaJSON {
		var b episodesBody
		if err := decodeFast(body, &b, -1); err != nil {
			return nil, locateBatchError(body, err)
		}
		if b.Episodes == nil {
			return nil, training.Invalid(-1, -1, "episodes", "is missing")
		}
		return b.Episodes, nil
	}
	var episodes []training.Episode
	for len(body) > 0 {
		line := body
		if i := bytes.IndexByte(body, '\n'); i >= 0 {
			line, body = body[:i], body[i+1:]
		} else {
			body = nil
		}
		if len(bytes.TrimSpace(line)) == 0 {
			continue
		}
		var ep training.Episode
		if err := decodeFast(line, &ep, len(episodes)); err != nil {
			return nil, locateEpisodeError(line, len(episodes))
		}
		episodes = append(episodes, ep)
	}
	return episodes, nil
}
