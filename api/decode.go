package api

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"mime"
	"net/http"
	"strings"

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

// decodeStrict decodes exactly one JSON value into v, refusing unknown
// fields and trailing data, and explains any failure in client terms.
func decodeStrict(data []byte, v any, episode int) error {
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(v); err != nil {
		return jsonProblem(err, episode)
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
func jsonProblem(err error, episode int) error {
	var syntax *json.SyntaxError
	var typeErr *json.UnmarshalTypeError
	switch {
	case errors.As(err, &syntax):
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
		return training.Invalid(episode, -1, field, "expected %s, got JSON %s", typeErr.Type, typeErr.Value)
	case strings.HasPrefix(err.Error(), "json: unknown field "):
		return training.Invalid(episode, -1, "", "%s is not a field of this request", strings.TrimPrefix(err.Error(), "json: unknown field "))
	default:
		return training.Invalid(episode, -1, "", "the JSON could not be decoded: %s", err.Error())
	}
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
