package api

import (
	"bytes"
	"encoding/json"
	"math"
	"math/rand/v2"
	"reflect"
	"testing"
)

// The hand-written choose answer decodes to exactly what encoding/json
// writes for the same response, for responses drawn at random (awkward
// strings, floats across the whole range, optional fields present or
// not) and for a few chosen by hand.
func TestChooseAnswerEncoding(t *testing.T) {
	step, yes, no := 7, true, false
	cases := []chooseResponse{
		{},
		{Action: "retry-in-3-days", Probability: 0.925, GreedyAction: "retry-in-3-days", Allowed: []string{"retry-now", "retry-in-3-days"}, Visits: 12, Revision: 3, CopyAgeSeconds: 0.0042},
		{Action: `quote " backslash \ <tag> & ünïcode`, Probability: 1e-7, Allowed: []string{}, CopyAgeSeconds: 1e21},
		{Action: "bad utf-8 \xff\xfe", GreedyAction: "\u2028\u2029\x00\x1f", Probability: math.SmallestNonzeroFloat64, CopyAgeSeconds: math.MaxFloat64},
		{Action: "a", Probability: math.Copysign(0, -1), Episode: "customer-17", Step: &step, Repeated: &yes},
		{Action: "a", Episode: "e", Step: new(int), Repeated: &no, Visits: math.MinInt64, Revision: math.MaxInt64},
	}
	rng := rand.New(rand.NewPCG(1, 2))
	for range 5000 {
		cases = append(cases, randomChooseResponse(rng))
	}
	for i, r := range cases {
		want, err := json.Marshal(r)
		if err != nil {
			t.Fatal(err)
		}
		got := r.appendJSON(nil)
		if !json.Valid(got) || !bytes.HasSuffix(got, []byte("}\n")) {
			t.Fatalf("case %d: %q is not one JSON object and a newline", i, got)
		}
		var gotValue, wantValue map[string]any
		if err := json.Unmarshal(got, &gotValue); err != nil {
			t.Fatal(err)
		}
		if err := json.Unmarshal(want, &wantValue); err != nil {
			t.Fatal(err)
		}
		if !reflect.DeepEqual(gotValue, wantValue) {
			t.Fatalf("case %d:\n got %s\nwant %s", i, got, want)
		}
	}
}

func randomChooseResponse(rng *rand.Rand) chooseResponse {
	str := func() string {
		pieces := []string{"a", "é", "\"", "\\", "<", "&", "\n", "\x01", "\u2028", "\xff", "😀", "state-12", " "}
		var b []byte
		for range rng.IntN(6) {
			b = append(b, pieces[rng.IntN(len(pieces))]...)
		}
		return string(b)
	}
	float := func() float64 {
		switch rng.IntN(4) {
		case 0:
			return rng.Float64()
		case 1:
			return math.Ldexp(rng.Float64(), rng.IntN(2000)-1000)
		case 2:
			return -math.Ldexp(rng.Float64(), rng.IntN(200)-100)
		default:
			return float64(rng.IntN(1000))
		}
	}
	r := chooseResponse{
		Action: str(), Probability: float(), Explored: rng.IntN(2) == 0, GreedyAction: str(),
		KnownState: rng.IntN(2) == 0, Visits: rng.Int64() - rng.Int64(), Fallback: rng.IntN(2) == 0,
		Revision: rng.Int64(), CopyAgeSeconds: float(),
	}
	if rng.IntN(4) > 0 {
		r.Allowed = make([]string, rng.IntN(4))
		for i := range r.Allowed {
			r.Allowed[i] = str()
		}
	}
	if rng.IntN(2) == 0 {
		step, repeated := rng.IntN(1000), rng.IntN(2) == 0
		r.Episode, r.Step, r.Repeated = str(), &step, &repeated
	}
	return r
}
