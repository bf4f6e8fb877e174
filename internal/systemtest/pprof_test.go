package systemtest

import (
	"context"
	"io"
	"strings"
	"testing"
	"time"

	"github.com/qtally/qtally/storage/pgtest"
)

// Profiles are served only on loopback: any other address is refused
// before the service starts.
func TestProfilingRefusesNonLoopbackAddresses(t *testing.T) {
	t.Parallel()
	databaseURL := pgtest.NewDatabase(t)
	for _, addr := range []string{"0.0.0.0:6060", ":6060", "192.0.2.1:6060"} {
		ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
		env := map[string]string{"DATABASE_URL": databaseURL, "QTALLY_LISTEN": "127.0.0.1:0"}
		err := run(ctx, []string{"qtally", "serve", "--pprof-listen", addr}, func(k string) string { return env[k] }, io.Discard, io.Discard)
		cancel()
		if err == nil || !strings.Contains(err.Error(), "loopback") {
			t.Errorf("--pprof-listen %s: got %v, want a refusal naming loopback", addr, err)
		}
	}
}
