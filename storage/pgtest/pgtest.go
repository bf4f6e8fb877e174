// Package pgtest gives tests migrated PostgreSQL databases of their own.
//
// A test package calls Main from TestMain. It uses the server at
// TEST_DATABASE_URL when set (the role needs CREATEDB), else starts a private
// one for the test binary. Main migrates one template database, and
// NewDatabase clones it, which is far cheaper than migrating per test.
package pgtest

import (
	"context"
	"crypto/rand"
	"fmt"
	"net/url"
	"os"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/qtally/qtally/storage"
	"github.com/qtally/qtally/storage/localpg"
)

// setupTimeout bounds starting a server (initdb included) and migrating.
const setupTimeout = 2 * time.Minute

var (
	adminURL string
	admin    *pgxpool.Pool
	// prefix starts the name of every database this binary creates, so that
	// binaries sharing a server never collide and leftovers can be found.
	prefix   string
	template string
	// strategy ends CREATE DATABASE for the clones: FILE_COPY when the
	// server knows it, an order of magnitude faster than the WAL_LOG default
	// of PostgreSQL 15 for small databases.
	strategy string
	created  atomic.Int64
)

// Main runs the tests of a package that needs PostgreSQL and exits with
// their result. Call it from TestMain.
func Main(m *testing.M) {
	code, err := run(m)
	if err != nil {
		fmt.Fprintf(os.Stderr, "pgtest: %v\n", err)
		if code == 0 {
			code = 1
		}
	}
	os.Exit(code)
}

func run(m *testing.M) (code int, err error) {
	ctx, cancel := context.WithTimeout(context.Background(), setupTimeout)
	defer cancel()

	adminURL = os.Getenv("TEST_DATABASE_URL")
	if adminURL == "" {
		var srv *localpg.Server
		if srv, err = localpg.Start(ctx, localpg.Options{}); err != nil {
			return 1, fmt.Errorf("TEST_DATABASE_URL is not set and a private server could not start: %w", err)
		}
		defer func() {
			if stopErr := srv.Stop(); stopErr != nil && err == nil {
				err = stopErr
			}
		}()
		adminURL = srv.DatabaseURL("postgres")
	}

	if admin, err = pgxpool.New(ctx, adminURL); err != nil {
		return 1, fmt.Errorf("admin connection: %w", err)
	}
	defer admin.Close()
	prefix = fmt.Sprintf("qtally_test_%d_%s", os.Getpid(), strings.ToLower(rand.Text()[:8]))
	template = prefix + "_template"
	// Dropping everything with the prefix also retries any database whose
	// test cleanup failed to drop it.
	defer func() {
		if dropErr := dropCreated(); dropErr != nil && err == nil {
			err = dropErr
		}
	}()
	if _, err = admin.Exec(ctx, "CREATE DATABASE "+ident(template)); err != nil {
		return 1, fmt.Errorf("create template database: %w", err)
	}
	if _, err = storage.Migrate(ctx, databaseURL(template)); err != nil {
		return 1, fmt.Errorf("migrate template database: %w", err)
	}
	var version int
	if err = admin.QueryRow(ctx, "SELECT current_setting('server_version_num')::int").Scan(&version); err != nil {
		return 1, fmt.Errorf("server version: %w", err)
	}
	if version >= 150000 {
		strategy = " STRATEGY FILE_COPY"
	}
	return m.Run(), nil
}

func dropCreated() error {
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	rows, err := admin.Query(ctx, "SELECT datname FROM pg_database WHERE starts_with(datname, $1)", prefix)
	if err != nil {
		return fmt.Errorf("list test databases: %w", err)
	}
	names, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		return fmt.Errorf("list test databases: %w", err)
	}
	for _, name := range names {
		if err := drop(ctx, name); err != nil {
			return err
		}
	}
	return nil
}

func drop(ctx context.Context, name string) error {
	// FORCE ends sessions a test left open, which would block the drop.
	if _, err := admin.Exec(ctx, "DROP DATABASE IF EXISTS "+ident(name)+" WITH (FORCE)"); err != nil {
		return fmt.Errorf("drop database %s: %w", name, err)
	}
	return nil
}

// NewDatabase creates a migrated database for t alone, dropped when t ends,
// and returns its URL.
func NewDatabase(t testing.TB) string {
	t.Helper()
	if admin == nil {
		t.Fatal("pgtest: NewDatabase needs pgtest.Main in TestMain")
	}
	name := fmt.Sprintf("%s_%d", prefix, created.Add(1))
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	if _, err := admin.Exec(ctx, "CREATE DATABASE "+ident(name)+" TEMPLATE "+ident(template)+strategy); err != nil {
		t.Fatalf("pgtest: create database: %v", err)
	}
	t.Cleanup(func() {
		ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
		defer cancel()
		if err := drop(ctx, name); err != nil {
			t.Errorf("pgtest: %v", err)
		}
	})
	return databaseURL(name)
}

// AdminURL is the URL of the server's maintenance database, for tests that
// manage databases themselves; empty until Main has set up.
func AdminURL() string {
	return adminURL
}

// NewServer starts a private server that t owns, for tests that stop and
// restart PostgreSQL (Halt, Resume, Restart). Its URL's database is
// migrated. The server stops, and its files go, when t ends.
func NewServer(t testing.TB) *localpg.Server {
	t.Helper()
	return startServer(t, localpg.Options{})
}

// databaseURL points adminURL at another database on the same server.
func databaseURL(name string) string {
	if u, err := url.Parse(adminURL); err == nil && (u.Scheme == "postgres" || u.Scheme == "postgresql") {
		u.Path = "/" + name
		u.RawPath = ""
		return u.String()
	}
	// Keyword/value form: a later keyword overrides an earlier one.
	return adminURL + " dbname='" + name + "'"
}

func ident(name string) string {
	return pgx.Identifier{name}.Sanitize()
}
