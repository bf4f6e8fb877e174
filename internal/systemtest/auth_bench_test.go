package systemtest

import (
	"bytes"
	"context"
	"io"
	"net/http"
	"testing"

	"github.com/qtally/qtally/internal/access"
	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/pgtest"
	"github.com/qtally/qtally/training"
)

// What checking tokens costs on the hottest route: choose with a token
// against choose with --no-auth, served by processes started in the same
// run. Compare the two req/s figures, not either one with a fixed number.
func BenchmarkChooseTokenCheck(b *testing.B) {
	services := map[string]*service{
		"no-auth": startService(b, pgtest.NewDatabase(b), "serve", "--no-worker", "--no-auth"),
		"token":   startService(b, pgtest.NewDatabase(b), "serve", "--no-worker", "--token-rate", "0"),
	}
	for _, s := range services {
		s.call("PUT", "/v1/policies/checkout", map[string]any{"actions": []string{"offer_help", "wait"}, "epsilon": 0.1}, 201)
	}
	client := &http.Client{Transport: &http.Transport{MaxIdleConnsPerHost: 64}}
	body := []byte(`{"state":"cart_abandoned","mode":"explore"}`)
	for _, name := range []string{"no-auth", "token"} {
		s := services[name]
		b.Run(name, func(b *testing.B) {
			b.SetParallelism(16)
			b.RunParallel(func(pb *testing.PB) {
				for pb.Next() {
					req, err := http.NewRequest(http.MethodPost, s.URL+"/v1/policies/checkout/choose", bytes.NewReader(body))
					if err != nil {
						b.Error(err)
						return
					}
					req.Header.Set("Content-Type", "application/json")
					req.Header.Set("Authorization", s.authorization)
					resp, err := client.Do(req)
					if err != nil {
						b.Error(err)
						return
					}
					_, _ = io.Copy(io.Discard, resp.Body)
					resp.Body.Close()
					if resp.StatusCode != http.StatusOK {
						b.Errorf("status %d", resp.StatusCode)
						return
					}
				}
			})
			b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "req/s")
		})
	}
}

// What one token check costs in the keyring an API process holds: a
// remembered secret (every request after the first), and a wrong secret
// for a real id (a full MAC each time).
func BenchmarkTokenVerify(b *testing.B) {
	url := pgtest.NewDatabase(b)
	secret := createToken(b, url, "--label", "bench", "--scope", "choose")
	db, err := storage.Open(context.Background(), url, 2, training.DefaultLimits())
	if err != nil {
		b.Fatal(err)
	}
	defer db.Close()
	keyring := access.NewKeyring(db, testPepper)
	if err := keyring.Reload(context.Background()); err != nil {
		b.Fatal(err)
	}
	wrong := secret[:len(secret)-1] + "A"
	if wrong == secret {
		wrong = secret[:len(secret)-1] + "B"
	}
	for _, c := range []struct {
		name, secret string
		ok           bool
	}{{"remembered", secret, true}, {"wrong-secret", wrong, false}} {
		b.Run(c.name, func(b *testing.B) {
			ctx := context.Background()
			b.ReportAllocs()
			for b.Loop() {
				if _, err := keyring.Verify(ctx, c.secret); (err == nil) != c.ok {
					b.Fatalf("verify: %v", err)
				}
			}
		})
	}
}
