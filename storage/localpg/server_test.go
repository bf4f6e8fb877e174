package localpg

import (
	"bytes"
	"context"
	"errors"
	"net"
	"net/url"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
)

// syncBuffer collects server output written from exec's copying goroutine.
type syncBuffer struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (b *syncBuffer) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.Write(p)
}

func (b *syncBuffer) String() string {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.String()
}

// reachableDir is a directory the server account can reach when the test
// runs as root; t.TempDir's are 0700.
func reachableDir(t *testing.T) string {
	t.Helper()
	dir, err := os.MkdirTemp("", "localpg-test-")
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { os.RemoveAll(dir) })
	if err := os.Chmod(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	return dir
}

func start(t *testing.T, opts Options) *Server {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	s, err := Start(ctx, opts)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		if err := s.Stop(); err != nil {
			t.Error(err)
		}
	})
	return s
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

func mustExec(t *testing.T, conn *pgx.Conn, sql string) {
	t.Helper()
	if _, err := conn.Exec(context.Background(), sql); err != nil {
		t.Fatalf("%s: %v", sql, err)
	}
}

func count(t *testing.T, conn *pgx.Conn) int {
	t.Helper()
	var n int
	if err := conn.QueryRow(context.Background(), "SELECT count(*) FROM kept").Scan(&n); err != nil {
		t.Fatalf("count: %v", err)
	}
	return n
}

func TestFindBinaries(t *testing.T) {
	dir, err := FindBinaries()
	if err != nil {
		t.Fatal(err)
	}
	for _, name := range []string{"initdb", "postgres"} {
		if _, err := os.Stat(filepath.Join(dir, name)); err != nil {
			t.Errorf("FindBinaries() = %s without %s: %v", dir, name, err)
		}
	}
}

func TestFindBinariesPicksNewestInstall(t *testing.T) {
	t.Setenv("PATH", t.TempDir())
	root := t.TempDir()
	installs := filepath.Join(root, "*", "bin")
	_, err := findBinaries(installs)
	if !errors.Is(err, ErrNoBinaries) || !strings.Contains(err.Error(), "apt-get install postgresql") {
		t.Fatalf("no installs: got %v, want ErrNoBinaries saying how to install", err)
	}
	for _, version := range []string{"9.6", "10", "15", "16"} {
		bin := filepath.Join(root, version, "bin")
		if err = os.MkdirAll(bin, 0o755); err != nil {
			t.Fatal(err)
		}
		names := []string{"initdb", "postgres"}
		if version == "16" {
			names = names[:1] // incomplete: no server binary
		}
		for _, name := range names {
			if err = os.WriteFile(filepath.Join(bin, name), nil, 0o755); err != nil {
				t.Fatal(err)
			}
		}
	}
	got, err := findBinaries(installs)
	if want := filepath.Join(root, "15", "bin"); got != want || err != nil {
		t.Errorf("findBinaries = %q, %v; want %q", got, err, want)
	}
}

func TestDataSurvivesRestartAndRestartOnSameDir(t *testing.T) {
	t.Parallel()
	// Parents that Start must create and hand over.
	dir := filepath.Join(reachableDir(t), "a", "pg")
	log := &syncBuffer{}
	s := start(t, Options{Dir: dir, Durable: true, Log: log})

	if !strings.Contains(log.String(), "ready to accept connections") {
		t.Errorf("Options.Log did not get the server log; got:\n%s", log)
	}
	if s.owner != nil {
		// Running as root: everything the server writes belongs to its account.
		for _, path := range []string{filepath.Dir(dir), dir, s.dataDir(), s.socketDir(), filepath.Join(dir, passwordName)} {
			info, err := os.Stat(path)
			if err != nil {
				t.Fatal(err)
			}
			if uid := int(info.Sys().(*syscall.Stat_t).Uid); uid != s.owner.uid {
				t.Errorf("%s owned by uid %d, want %s (%d)", path, uid, s.owner.name, s.owner.uid)
			}
		}
	}
	info, err := os.Stat(filepath.Join(dir, passwordName))
	if err != nil {
		t.Fatal(err)
	}
	if perm := info.Mode().Perm(); perm != 0o600 {
		t.Errorf("password file mode %o, want 600", perm)
	}

	conn := connect(t, s.URL())
	var db, user string
	if err := conn.QueryRow(context.Background(), "SELECT current_database(), current_user").Scan(&db, &user); err != nil {
		t.Fatal(err)
	}
	if db != Database || user != Role {
		t.Errorf("connected to %s as %s, want %s as %s", db, user, Database, Role)
	}
	mustExec(t, conn, "CREATE TABLE kept (n int)")
	mustExec(t, conn, "INSERT INTO kept VALUES (1)")

	ctx := context.Background()
	if err := s.Halt(); err != nil {
		t.Fatal(err)
	}
	if err := conn.Ping(ctx); err == nil {
		t.Error("connection still works after Halt")
	}
	if _, err := pgx.Connect(ctx, s.URL()); err == nil {
		t.Error("connected to a halted server")
	}
	if err := s.Resume(ctx); err != nil {
		t.Fatal(err)
	}
	if err := s.Resume(ctx); err == nil {
		t.Error("Resume of a running server succeeded")
	}
	conn = connect(t, s.URL())
	if n := count(t, conn); n != 1 {
		t.Fatalf("after Resume: %d rows, want 1", n)
	}
	mustExec(t, conn, "INSERT INTO kept VALUES (2)")
	conn.Close(ctx)

	if err := s.Stop(); err != nil {
		t.Fatal(err)
	}
	if _, err := os.Stat(filepath.Join(dir, dataDirName, "PG_VERSION")); err != nil {
		t.Fatalf("Stop removed a caller's Dir: %v", err)
	}

	again := start(t, Options{Dir: dir})
	if again.URL() != s.URL() {
		t.Errorf("URL changed across runs: %s, then %s", s.URL(), again.URL())
	}
	if n := count(t, connect(t, again.URL())); n != 2 {
		t.Fatalf("after restart on the same Dir: %d rows, want 2", n)
	}
}

func TestStopRemovesTempDir(t *testing.T) {
	t.Parallel()
	s := start(t, Options{})
	if !s.tempDir {
		t.Fatal("empty Dir did not make a temporary directory")
	}
	conn := connect(t, s.URL())
	var socket bool
	// inet_server_addr is NULL over a unix socket.
	if err := conn.QueryRow(context.Background(), "SELECT inet_server_addr() IS NULL").Scan(&socket); err != nil {
		t.Fatal(err)
	}
	if !socket {
		t.Error("Port 0 connected over TCP, want the unix socket")
	}
	var setting string
	if err := conn.QueryRow(context.Background(), "SHOW fsync").Scan(&setting); err != nil {
		t.Fatal(err)
	}
	if setting != "off" {
		t.Errorf("non-durable server has fsync=%s", setting)
	}
	if err := s.Stop(); err != nil {
		t.Fatal(err)
	}
	if _, err := os.Stat(s.dir); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("temporary Dir %s still there after Stop: %v", s.dir, err)
	}
}

func TestTCPNeedsThePassword(t *testing.T) {
	t.Parallel()
	s := start(t, Options{Port: -1})
	u, err := url.Parse(s.URL())
	if err != nil {
		t.Fatal(err)
	}
	if host := u.Hostname(); host != "127.0.0.1" || u.Port() == "" {
		t.Fatalf("URL host %q, want 127.0.0.1 with a port", u.Host)
	}
	conn := connect(t, s.URL())
	var addr string
	if err := conn.QueryRow(context.Background(), "SELECT host(inet_server_addr())").Scan(&addr); err != nil {
		t.Fatal(err)
	}
	if addr != "127.0.0.1" {
		t.Errorf("server address %q, want 127.0.0.1", addr)
	}

	for name, user := range map[string]*url.Userinfo{
		"wrong password": url.UserPassword(Role, "not-the-password"),
		"no password":    url.User(Role),
	} {
		bad := *u
		bad.User = user
		_, err := pgx.Connect(context.Background(), bad.String())
		var pgErr *pgconn.PgError
		// 28P01: invalid_password, which is also what a missing one gets.
		if !errors.As(err, &pgErr) || pgErr.Code != "28P01" {
			t.Errorf("%s: got %v, want SQLSTATE 28P01", name, err)
		}
	}
}

func TestEarlyExitReportsLog(t *testing.T) {
	t.Parallel()
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	_, err = Start(context.Background(), Options{Port: l.Addr().(*net.TCPAddr).Port})
	if err == nil {
		t.Fatal("Start on a taken port succeeded")
	}
	if !strings.Contains(err.Error(), "Address already in use") {
		t.Errorf("error lacks the server log: %v", err)
	}
}

func TestThrowawayClustersComeFromTheCache(t *testing.T) {
	t.Setenv("XDG_CACHE_HOME", reachableDir(t))
	bin, err := FindBinaries()
	if err != nil {
		t.Fatal(err)
	}
	cache := clusterCache(bin)
	if !strings.HasPrefix(cache, os.Getenv("XDG_CACHE_HOME")) {
		t.Fatalf("cache %q is not under XDG_CACHE_HOME", cache)
	}

	first := start(t, Options{})
	if _, err := os.Stat(filepath.Join(cache, "PG_VERSION")); err != nil {
		t.Fatalf("first server did not fill the cache: %v", err)
	}
	if err := first.Stop(); err != nil {
		t.Fatal(err)
	}
	// A file only the cache has shows where the next cluster came from.
	if err := os.WriteFile(filepath.Join(cache, "from-cache"), nil, 0o600); err != nil {
		t.Fatal(err)
	}
	second := start(t, Options{})
	if _, err := os.Stat(filepath.Join(second.dataDir(), "from-cache")); err != nil {
		t.Errorf("second cluster was not copied from the cache: %v", err)
	}
	conn := connect(t, second.URL())
	mustExec(t, conn, "CREATE TABLE kept (n int)")

	durable := start(t, Options{Durable: true})
	if _, err := os.Stat(filepath.Join(durable.dataDir(), "from-cache")); err == nil {
		t.Error("durable cluster was copied from the unsynced cache")
	}
}
