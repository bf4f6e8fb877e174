package api

import (
	"math"
	"net/http"
	"strconv"
	"sync"

	"github.com/go-json-experiment/json/jsontext"
	"github.com/labstack/echo/v4"
)

// answerBuffers hold choose answers while they are written: the answer is
// the hottest response of the service, and reflection-based encoding was
// about a fifth of its handler's time.
var answerBuffers = sync.Pool{New: func() any { b := make([]byte, 0, 512); return &b }}

// writeChooseAnswer writes r as JSON, encoded by hand; what it writes
// decodes to what encoding/json writes for r (TestChooseAnswerEncoding).
func writeChooseAnswer(c echo.Context, r chooseResponse) error {
	if !finite(r.Probability) || !finite(r.CopyAgeSeconds) {
		return c.JSON(http.StatusOK, r) // refused there, with the error it gives
	}
	buf := answerBuffers.Get().(*[]byte)
	defer answerBuffers.Put(buf)
	*buf = r.appendJSON((*buf)[:0])
	return c.Blob(http.StatusOK, echo.MIMEApplicationJSON, *buf)
}

func finite(f float64) bool { return !math.IsNaN(f) && !math.IsInf(f, 0) }

// appendJSON appends r in the field order and with the omissions its
// struct tags give.
func (r chooseResponse) appendJSON(b []byte) []byte {
	b = append(b, `{"action":`...)
	b = appendString(b, r.Action)
	b = append(b, `,"probability":`...)
	b = jsontext.AppendFloat(b, r.Probability, 64)
	b = append(b, `,"explored":`...)
	b = strconv.AppendBool(b, r.Explored)
	b = append(b, `,"greedy_action":`...)
	b = appendString(b, r.GreedyAction)
	b = append(b, `,"known_state":`...)
	b = strconv.AppendBool(b, r.KnownState)
	b = append(b, `,"allowed":`...)
	if r.Allowed == nil {
		b = append(b, "null"...)
	} else {
		b = append(b, '[')
		for i, a := range r.Allowed {
			if i > 0 {
				b = append(b, ',')
			}
			b = appendString(b, a)
		}
		b = append(b, ']')
	}
	b = append(b, `,"visits":`...)
	b = strconv.AppendInt(b, r.Visits, 10)
	b = append(b, `,"fallback":`...)
	b = strconv.AppendBool(b, r.Fallback)
	b = append(b, `,"revision":`...)
	b = strconv.AppendInt(b, r.Revision, 10)
	b = append(b, `,"copy_age_seconds":`...)
	b = jsontext.AppendFloat(b, r.CopyAgeSeconds, 64)
	if r.Episode != "" {
		b = append(b, `,"episode":`...)
		b = appendString(b, r.Episode)
	}
	if r.Step != nil {
		b = append(b, `,"step":`...)
		b = strconv.AppendInt(b, int64(*r.Step), 10)
	}
	if r.Repeated != nil {
		b = append(b, `,"repeated":`...)
		b = strconv.AppendBool(b, *r.Repeated)
	}
	return append(b, "}\n"...)
}

// appendString appends s as a JSON string. Invalid UTF-8 becomes U+FFFD,
// as encoding/json writes it; the error that reports it is not needed.
func appendString(b []byte, s string) []byte {
	b, _ = jsontext.AppendQuote(b, s)
	return b
}
