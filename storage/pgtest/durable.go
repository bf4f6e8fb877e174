package pgtest

import (
	"context"
	"testing"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/localpg"
)

// NewDurableServer is NewServer with PostgreSQL's crash-safety defaults
// (fsync, synchronous_commit and full_page_writes on), for benchmarks whose
// figures depend on the cost of a durable commit.
func NewDurableServer(t testing.TB) *localpg.Server {
	t.Helper()
	return startServer(t, localpg.Options{Durable: true})
}

func startServer(t testing.TB, opts localpg.Options) *localpg.Server {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), setupTimeout)
	defer cancel()
	srv, err := localpg.Start(ctx, opts)
	if err != nil {
		t.Fatalf("pgtest: %v", err)
	}
	t.Cleanup(func() {
		if err := srv.Stop(); err != nil {
			t.Errorf("pgtest: %v", err)
		}
	})
	if _, err := storage.Migrate(ctx, srv.URL()); err != nil {
		t.Fatalf("pgtest: migrate: %v", err)
	}
	return srv
}
