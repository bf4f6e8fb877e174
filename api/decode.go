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
	tooLarge := func() error {
		return echo.NewHTTPError(http.StatusRequestEntityTooLarge,
			fmt.Sprintf("the body is larger than the limit of %d bytes; send fewer episodes per request", limit))
	}
	var body []byte
	if n := req.ContentLength; n >= 0 {
		// The server stops the body at its declared length: read exactly
		// that into one buffer, refusing a declared length over the limit
		// before reading any of it.
		if n > limit {
			return nil, "", tooLarge()
		}
		body = make([]byte, n)
		_, err = io.ReadFull(req.Body, body)
	} else {
		body, err = io.ReadAll(http.MaxBytesReader(c.Response(), req.Body, limit))
		var over *http.MaxBytesError
		if errors.As(err, &over) {
			return nil, "", tooLarge()
		}
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
			return training.Invalid(episode, -1, field, "the number %s is out of range", training.Truncate(number, 64))
		}
		got, _, _ := strings.Cut(typeErr.Value, " ")
		return training.Invalid(episode, -1, field, "expected %s, got %s", want, jsonKind(got))
	case strings.HasPrefix(err.Error(), "json: unknown field "):
		return training.Invalid(episode, -1, "", "%s is not a field of this request", training.Truncate(strings.TrimPrefix(err.Error(), "json: unknown field "), 64))
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

// undecodedBatch is an episode batch that did not decode: every problem
// found in it, and the episodes as far as they decoded (nil when the body
// has no list of episodes), so that the policy's checks can add the
// problems of the rest.
type undecodedBatch struct {
	problems []training.FieldError
	episodes []training.Episode
	err      error
}

func (b *undecodedBatch) Error() string { return b.err.Error() }
func (b *undecodedBatch) Unwrap() error { return b.err }

func newUndecodedBatch(problems []training.FieldError, episodes []training.Episode) *undecodedBatch {
	return &undecodedBatch{problems: problems, episodes: episodes, err: training.Refuse(problems)}
}

// maxDecodeProblems bounds what decoding a body collects, so that a hostile
// body cannot make its refusal cost more than the request: past it,
// decoding stops and says so.
const maxDecodeProblems = 100

// problemSink collects decoding problems, up to maxDecodeProblems.
type problemSink struct {
	problems []training.FieldError
	full     bool
}

func (s *problemSink) add(problems ...training.FieldError) {
	for _, p := range problems {
		switch {
		case len(s.problems) < maxDecodeProblems:
			s.problems = append(s.problems, p)
		case !s.full:
			s.full = true
			s.problems = append(s.problems, training.FieldError{Episode: -1, Step: -1,
				Message: fmt.Sprintf("decoding stopped after %d problems; there may be more", maxDecodeProblems)})
		}
	}
}

// problemsOf lists the located problems of a refusal; none for nil.
func problemsOf(err error) []training.FieldError {
	if err == nil {
		return nil
	}
	var verr *training.ValidationError
	if errors.As(err, &verr) {
		return verr.Problems
	}
	return []training.FieldError{{Episode: -1, Step: -1, Message: err.Error()}}
}

type episodesBody struct {
	Episodes []training.Episode `json:"episodes"`
}

// decodeEpisodes reads a JSON batch or NDJSON (one episode object a line).
// A body that does not decode whole is decoded again member by member (the
// error path only), so that the refusal, an *undecodedBatch, lists every
// problem with its episode, step and field, and says so when the body is
// in the other format or is a single episode.
func decodeEpisodes(body []byte, media string) ([]training.Episode, error) {
	if media == mediaJSON {
		var b episodesBody
		if err := decodeFast(body, &b, -1); err != nil {
			return nil, undecodableBatch(body, err)
		}
		if b.Episodes == nil {
			return nil, training.Invalid(-1, -1, "episodes", "is missing")
		}
		return b.Episodes, nil
	}
	var episodes []training.Episode
	var sink problemSink
	for rest := body; len(rest) > 0 && !sink.full; {
		line := rest
		if i := bytes.IndexByte(rest, '\n'); i >= 0 {
			line, rest = rest[:i], rest[i+1:]
		} else {
			rest = nil
		}
		if len(bytes.TrimSpace(line)) == 0 {
			continue
		}
		var ep training.Episode
		if err := decodeFast(line, &ep, len(episodes)); err != nil {
			if len(episodes) == 0 && isBatchObject(body) {
				return nil, training.Invalid(-1, -1, "", `the body is a JSON batch {"episodes": [...]}, not NDJSON; send it with Content-Type: application/json`)
			}
			ep = decodeEpisodeMembers(line, len(episodes), err, &sink)
		}
		episodes = append(episodes, ep)
	}
	if len(sink.problems) > 0 {
		return nil, newUndecodedBatch(sink.problems, episodes)
	}
	return episodes, nil
}

// undecodableBatch explains why a JSON batch did not decode.
func undecodableBatch(body []byte, err error) error {
	if !json.Valid(body) {
		if n, ok := ndjsonValues(body); ok {
			return training.Invalid(-1, -1, "", "the body holds %d JSON values, one a line: that is NDJSON; send it with Content-Type: application/x-ndjson, or post one JSON object {\"episodes\": [...]}", n)
		}
		return err
	}
	trimmed := bytes.TrimLeft(body, " \t\r\n")
	if len(trimmed) > 0 && trimmed[0] == '[' {
		return training.Invalid(-1, -1, "", `the body is a JSON array; post the episodes inside an object: {"episodes": [...]}`)
	}
	members, ok := objectMembers(body)
	if !ok {
		return err
	}
	var batch, episode bool
	for _, m := range members {
		batch = batch || strings.EqualFold(m.name, "episodes")
		episode = episode || strings.EqualFold(m.name, "id") || strings.EqualFold(m.name, "steps")
	}
	if episode && !batch {
		return training.Invalid(-1, -1, "", `the body is one episode, not a batch: post {"episodes": [ ...the episode... ]}, or send episodes one a line as application/x-ndjson`)
	}
	var sink problemSink
	var episodes []training.Episode
	listed := false
	for _, m := range members {
		if !strings.EqualFold(m.name, "episodes") {
			sink.add(unknownMember(m.name, -1, -1))
			continue
		}
		items, ok := arrayItems(m.value)
		if !ok {
			derr := decodeStrict(m.value, new([]training.Episode), -1)
			if derr == nil { // null
				derr = training.Invalid(-1, -1, "episodes", "is missing")
			}
			sink.add(locate(problemsOf(derr), -1, "episodes")...)
			continue
		}
		listed = true
		episodes = make([]training.Episode, len(items))
		for i, raw := range items {
			if sink.full {
				break
			}
			if derr := decodeStrict(raw, &episodes[i], i); derr != nil {
				episodes[i] = decodeEpisodeMembers(raw, i, derr, &sink)
			}
		}
	}
	if len(sink.problems) == 0 {
		return err
	}
	if !listed {
		episodes = nil
	}
	return newUndecodedBatch(sink.problems, episodes)
}

// decodeEpisodeMembers decodes an episode that failed to decode whole, one
// member at a time, adding a located problem for each member that does not
// decode, and returns the episode as far as it did. err is the episode's
// own decoding error, reported when the members say nothing more.
func decodeEpisodeMembers(raw []byte, episode int, err error, sink *problemSink) training.Episode {
	var ep training.Episode
	before := len(sink.problems)
	decodeMembers(raw, reflect.ValueOf(&ep).Elem(), episode, -1, sink)
	if len(sink.problems) == before {
		// Every member decoded alone (a repeated member, say).
		sink.add(problemsOf(err)...)
	}
	return ep
}

// decodeMembers decodes a JSON object into the struct v, member by member,
// adding a located problem for each member that does not decode or names
// no field of v. Members match fields by JSON name, ignoring case, as the
// decoder does. A list of objects (an episode's steps) is decoded item by
// item, each item's problems located at its index as the step.
func decodeMembers(raw []byte, v reflect.Value, episode, step int, sink *problemSink) {
	members, ok := objectMembers(raw)
	if !ok {
		sink.add(locate(problemsOf(decodeStrict(raw, v.Addr().Interface(), episode)), step, "")...)
		return
	}
	for _, m := range members {
		if sink.full {
			return
		}
		field, name := jsonField(v, m.name)
		if !field.IsValid() {
			sink.add(unknownMember(m.name, episode, step))
			continue
		}
		if items, ok := arrayItems(m.value); ok && step < 0 && field.Kind() == reflect.Slice && field.Type().Elem().Kind() == reflect.Struct {
			field.Set(reflect.MakeSlice(field.Type(), len(items), len(items)))
			for j, item := range items {
				decodeMembers(item, field.Index(j), episode, j, sink)
			}
			continue
		}
		sink.add(locate(problemsOf(decodeStrict(m.value, field.Addr().Interface(), episode)), step, name)...)
	}
}

// jsonField finds the field of a struct value a JSON member decodes into,
// and its JSON name.
func jsonField(v reflect.Value, member string) (reflect.Value, string) {
	t := v.Type()
	for i := range t.NumField() {
		name, _, _ := strings.Cut(t.Field(i).Tag.Get("json"), ",")
		if name != "" && name != "-" && strings.EqualFold(name, member) {
			return v.Field(i), name
		}
	}
	return reflect.Value{}, ""
}

// locate places problems of a member's value at the step and field they
// are in; problems that were errors of the whole body say nothing about
// where, and the member does.
func locate(problems []training.FieldError, step int, field string) []training.FieldError {
	out := slices.Clone(problems)
	for i := range out {
		if step >= 0 {
			out[i].Step = step
		}
		if out[i].Field == "" {
			out[i].Field = field
		}
	}
	return out
}

// unknownMember is the problem of a member that names no field; it is
// located at the member's own name.
func unknownMember(name string, episode, step int) training.FieldError {
	return training.FieldError{Episode: episode, Step: step, Field: training.Truncate(name, 61),
		Message: training.Truncate(`"`+name+`"`, 64) + " is not a field of this request"}
}

// jsonMember is one member of a JSON object, in the order sent.
type jsonMember struct {
	name  string
	value json.RawMessage
}

// objectMembers splits a JSON object into its members; false when raw is
// not one.
func objectMembers(raw []byte) ([]jsonMember, bool) {
	dec := json.NewDecoder(bytes.NewReader(raw))
	if tok, err := dec.Token(); err != nil || tok != json.Delim('{') {
		return nil, false
	}
	var members []jsonMember
	for dec.More() {
		tok, err := dec.Token()
		name, isName := tok.(string)
		if err != nil || !isName {
			return nil, false
		}
		var value json.RawMessage
		if err := dec.Decode(&value); err != nil {
			return nil, false
		}
		members = append(members, jsonMember{name, value})
	}
	return members, true
}

// arrayItems splits a JSON array into its items; false when raw is not one.
func arrayItems(raw []byte) ([]json.RawMessage, bool) {
	var items []json.RawMessage
	trimmed := bytes.TrimSpace(raw)
	if len(trimmed) == 0 || trimmed[0] != '[' || json.Unmarshal(trimmed, &items) != nil {
		return nil, false
	}
	return items, true
}

// ndjsonValues counts the lines of a body that each hold a JSON value; ok
// when there are at least two and every non-blank line holds one.
func ndjsonValues(body []byte) (int, bool) {
	n := 0
	for _, line := range bytes.Split(body, []byte("\n")) {
		if len(bytes.TrimSpace(line)) == 0 {
			continue
		}
		if !json.Valid(line) {
			return 0, false
		}
		n++
	}
	return n, n >= 2
}

// isBatchObject reports whether a body is one JSON object with an episodes
// member: a JSON batch.
func isBatchObject(body []byte) bool {
	if !json.Valid(body) {
		return false
	}
	members, _ := objectMembers(body)
	return slices.ContainsFunc(members, func(m jsonMember) bool { return strings.EqualFold(m.name, "episodes") })
}
