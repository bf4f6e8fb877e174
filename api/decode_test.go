package api

import (
	"reflect"
	"testing"

	"github.com/qtally/qtally/training"
)

// Bodies on which the two JSON decoders differ, or might: decodeFast must
// give decodeStrict's outcome on each (the same value, or the same error).
var decodeCorpus = []string{
	`{"state":"s","mode":"explore"}`,
	`{"state":"s","mode":null}`,
	`{"mode":"explore","state":"s","state":"t"}`,
	`{"State":"s","MODE":"explore"}`,
	`{"state":"s","bogus":1}`,
	`{"state":"s\ud800x","mode":"greedy"}`,
	"{\"state\":\"s\xff\",\"mode\":\"greedy\"}",
	`{"state":"s"} {"state":"t"}`,
	`{"state":"s"}   `,
	`{"state":"s","allowed":["a",null]}`,
	`{"state":"s","allowed":[]}`,
	`{"state":1}`,
	`{"state":"s"`,
	``,
	`null`,
	`[]`,
	`{"episodes":[{"id":"e1","steps":[{"state":"s","action":"a","reward":1.5,"probability":0.25}]}]}`,
	`{"episodes":[{"id":"e1","steps":[{"state":"s","action":"a","reward":1e400}]}]}`,
	`{"episodes":[{"id":"e1","steps":[{"state":"s","action":"a","reward":-0,"probability":null}]}]}`,
	`{"episodes":[{"id":"e1","steps":[{"state":"s","action":"a","reward":"1"}]}]}`,
	`{"episodes":[{"id":"e1","ID":"e2","steps":[]}]}`,
	`{"episodes":[{"id":"e1","steps":[{"state":"s","action":"a","reward":2,"reward":3}]}]}`,
	`{"episodes":null}`,
	`{"episodes":[{"id":"e1","steps":[{"state":"s","action":"a","reward":2,"extra":true}]}]}`,
	`{"episodes":[{"id":"\u00e9\n","steps":[{"state":"s","action":"a","reward":12345678901234567890}]}]}`,
}

func TestDecodeFastGivesDecodeStrictsOutcome(t *testing.T) {
	for _, body := range decodeCorpus {
		checkSameDecoding(t, []byte(body))
	}
}

func FuzzDecodeFastMatchesDecodeStrict(f *testing.F) {
	for _, body := range decodeCorpus {
		f.Add([]byte(body))
	}
	f.Fuzz(checkSameDecoding)
}

func checkSameDecoding(t *testing.T, body []byte) {
	t.Helper()
	fastChoose, strictChoose := chooseRequest{Mode: training.Greedy}, chooseRequest{Mode: training.Greedy}
	compare(t, body, "choose", decodeFast(body, &fastChoose, -1), decodeStrict(body, &strictChoose, -1), fastChoose, strictChoose)
	var fastBatch, strictBatch episodesBody
	compare(t, body, "episodes", decodeFast(body, &fastBatch, -1), decodeStrict(body, &strictBatch, -1), fastBatch, strictBatch)
	var fastEp, strictEp training.Episode
	compare(t, body, "episode", decodeFast(body, &fastEp, 3), decodeStrict(body, &strictEp, 3), fastEp, strictEp)
}

func compare(t *testing.T, body []byte, what string, fastErr, strictErr error, fast, strict any) {
	t.Helper()
	if (fastErr == nil) != (strictErr == nil) || (fastErr != nil && fastErr.Error() != strictErr.Error()) {
		t.Fatalf("%s %q: decodeFast error %v, decodeStrict error %v", what, body, fastErr, strictErr)
	}
	if fastErr == nil && !reflect.DeepEqual(fast, strict) {
		t.Fatalf("%s %q: decodeFast gave %+v, decodeStrict %+v", what, body, fast, strict)
	}
}
