package pgtest_test

import (
	"context"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/qtally/qtally/storage/pgtest"
)

func TestMain(m *testing.M) {
	pgtest.Main(m)
}

func connect(t *testing.T, databaseURL string) *pgx.Conn {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	conn, err := pgx.Connect(ctx, databaseURL)
	if err != nil {
		t.Fatalf("connect: %v", err)
	}
	t.Cleanup(func() { conn.Close(context.Background()) })
	return conn
}

func hasTable(t *testing.T, conn *pgx.Conn, table string) bool {
	t.Helper()
	var exists bool
	if err := conn.QueryRow(context.Background(), "SELECT to_regclass($1) IS NOT NULL", table).Scan(&exists); err != nil {
		t.Fatal(err)
	}
	return exists
}

func databaseExists(t *testing.T, name string) bool {
	t.Helper()
	var exists bool
	err := connect(t, pgtest.AdminURL()).QueryRow(context.Background(),
		"SELECT EXISTS (SELECT 1 FROM pg_database WHERE datname = $1)", name).Scan(&exists)
	if err != nil {
		t.Fatal(err)
	}
	return exists
}

func TestDatabasesAreMigratedAndIsolated(t *testing.T) {
	var names [2]string
	t.Run("two databases", func(t *testing.T) {
		a, b := connect(t, pgtest.NewDatabase(t)), connect(t, pgtest.NewDatabase(t))
		ctx := context.Background()
		for i, conn := range []*pgx.Conn{a, b} {
			if err := conn.QueryRow(ctx, "SELECT current_database()").Scan(&names[i]); err != nil {
				t.Fatal(err)
			}
			if !hasTable(t, conn, "policies") {
				t.Errorf("database %s is not migrated: no policies table", names[i])
			}
		}
		if names[0] == names[1] {
			t.Fatalf("both databases are %s", names[0])
		}
		if _, err := a.Exec(ctx, "CREATE TABLE only_in_a (n int)"); err != nil {
			t.Fatal(err)
		}
		if hasTable(t, b, "only_in_a") {
			t.Error("a table made in one database shows in the other")
		}
	})
	for _, name := range names {
		if name != "" && databaseExists(t, name) {
			t.Errorf("database %s still exists after its test ended", name)
		}
	}
}

func TestNewServerRestarts(t *testing.T) {
	srv := pgtest.NewServer(t)
	ctx := context.Background()
	conn := connect(t, srv.URL())
	if !hasTable(t, conn, "policies") {
		t.Fatal("NewServer's database is not migrated")
	}
	if _, err := conn.Exec(ctx, "CREATE TABLE kept (n int)"); err != nil {
		t.Fatal(err)
	}
	if err := srv.Halt(); err != nil {
		t.Fatal(err)
	}
	if err := conn.Ping(ctx); err == nil {
		t.Error("connection works while the server is halted")
	}
	if err := srv.Resume(ctx); err != nil {
		t.Fatal(err)
	}
	if !hasTable(t, connect(t, srv.URL()), "kept") {
		t.Error("data lost across Halt and Resume")
	}
}
