package api

import (
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"testing"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/qtally/qtally/internal/metrics"
	"github.com/qtally/qtally/training"
)

// Benchmarks of what an episode post costs before storage: decoding the
// body and validating and packing the episodes. Bodies have the shape the
// load command posts: 100 episodes of 20 steps, every step with a
// probability. CI runs each once (-benchtime=1x) so that they keep working.

const (
	benchEpisodes = 100
	benchSteps    = 20
)

var benchActions = []string{"retry_card", "wait", "email_reminder", "text_reminder"}

func benchEpisodeList() []training.Episode {
	rng := rand.New(rand.NewPCG(1, 2))
	eps := make([]training.Episode, benchEpisodes)
	for i := range eps {
		ep := training.Episode{ID: fmt.Sprintf("bench-%016x-%d", rng.Uint64(), i), Steps: make([]training.Step, benchSteps)}
		for t := range ep.Steps {
			s := rng.IntN(10_000)
			p := 0.25
			ep.Steps[t] = training.Step{State: fmt.Sprintf("tier=%d|day=%d|reason=%d", s%7, (s/7)%30, s/210),
				Action: benchActions[rng.IntN(len(benchActions))], Reward: float64(rng.IntN(200)-50) / 10, Probability: &p}
		}
		eps[i] = ep
	}
	return eps
}

func benchBodies(b *testing.B) (batch, ndjson []byte) {
	eps := benchEpisodeList()
	batch, err := json.Marshal(episodesBody{Episodes: eps})
	if err != nil {
		b.Fatal(err)
	}
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	for _, ep := range eps {
		if err := enc.Encode(ep); err != nil {
			b.Fatal(err)
		}
	}
	return batch, buf.Bytes()
}

func reportSteps(b *testing.B, bodyLen int) {
	steps := float64(benchEpisodes * benchSteps * b.N)
	b.ReportMetric(steps/b.Elapsed().Seconds(), "steps/s")
	b.SetBytes(int64(bodyLen))
}

// BenchmarkDecodeEpisodes decodes a 100-episode body (JSON and NDJSON).
func BenchmarkDecodeEpisodes(b *testing.B) {
	batch, ndjson := benchBodies(b)
	for _, tc := range []struct {
		name, media string
		body        []byte
	}{{"json", mediaJSON, batch}, {"ndjson", mediaNDJSON, ndjson}} {
		b.Run(tc.name, func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				if _, err := decodeEpisodes(tc.body, tc.media); err != nil {
					b.Fatal(err)
				}
			}
			reportSteps(b, len(tc.body))
		})
	}
}

// BenchmarkEncodeEpisodes validates a decoded batch against its policy and
// packs it into columns (storage.Ingest's work before the COPY).
func BenchmarkEncodeEpisodes(b *testing.B) {
	eps := benchEpisodeList()
	s := training.DefaultSettings()
	s.Actions = benchActions
	lim := training.DefaultLimits()
	b.ReportAllocs()
	for b.Loop() {
		if _, err := training.ValidateAndEncodeEpisodes(s, eps, lim); err != nil {
			b.Fatal(err)
		}
	}
	reportSteps(b, 0)
}

// BenchmarkDecodeAndEncodeEpisodes is both: a post's CPU work before storage.
func BenchmarkDecodeAndEncodeEpisodes(b *testing.B) {
	batch, _ := benchBodies(b)
	s := training.DefaultSettings()
	s.Actions = benchActions
	lim := training.DefaultLimits()
	b.ReportAllocs()
	for b.Loop() {
		eps, err := decodeEpisodes(batch, mediaJSON)
		if err != nil {
			b.Fatal(err)
		}
		if _, err := training.ValidateAndEncodeEpisodes(s, eps, lim); err != nil {
			b.Fatal(err)
		}
	}
	reportSteps(b, len(batch))
}

// BenchmarkDecodeChoose decodes a choose request body as the handler does.
func BenchmarkDecodeChoose(b *testing.B) {
	body := []byte(`{"state":"tier=3|day=12|reason=40","mode":"explore"}`)
	b.ReportAllocs()
	for b.Loop() {
		req := chooseRequest{Mode: training.Greedy}
		if err := decodeFast(body, &req, -1); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkDecodeAndEncodeMaskedEpisodes is BenchmarkDecodeAndEncodeEpisodes
// with every step carrying the allowed set it was chosen from (three of the
// four actions), as a client that masks posts them.
func BenchmarkDecodeAndEncodeMaskedEpisodes(b *testing.B) {
	eps := benchEpisodeList()
	for _, ep := range eps {
		for t := range ep.Steps {
			allowed := []string{ep.Steps[t].Action}
			for _, a := range benchActions {
				if a != ep.Steps[t].Action && len(allowed) < 3 {
					allowed = append(allowed, a)
				}
			}
			ep.Steps[t].Allowed = allowed
		}
	}
	batch, err := json.Marshal(episodesBody{Episodes: eps})
	if err != nil {
		b.Fatal(err)
	}
	s := training.DefaultSettings()
	s.Actions = benchActions
	lim := training.DefaultLimits()
	b.ReportAllocs()
	for b.Loop() {
		eps, err := decodeEpisodes(batch, mediaJSON)
		if err != nil {
			b.Fatal(err)
		}
		if _, err := training.ValidateAndEncodeEpisodes(s, eps, lim); err != nil {
			b.Fatal(err)
		}
	}
	reportSteps(b, len(batch))
}

// BenchmarkRequestOverhead is what every request pays around its handler:
// routing, the metrics, the request id, the request log line (at the
// default level, which leaves out a fast answer) and the panic guard.
// /livez is served because its handler does almost nothing else.
func BenchmarkRequestOverhead(b *testing.B) {
	logger := slog.New(slog.NewJSONHandler(io.Discard, &slog.HandlerOptions{Level: slog.LevelInfo}))
	h := NewServer(Config{}, Deps{Logger: logger, Metrics: metrics.New(prometheus.NewRegistry())})
	b.ReportAllocs()
	for b.Loop() {
		rec := httptest.NewRecorder()
		h.ServeHTTP(rec, httptest.NewRequest(http.MethodGet, "/livez", nil))
		if rec.Code != http.StatusOK {
			b.Fatalf("status %d", rec.Code)
		}
	}
}
