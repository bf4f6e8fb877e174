// Package localpg runs a private PostgreSQL server from the locally installed
// binaries, for `qtally dev` and for tests.
package localpg

import (
	"context"
	"crypto/rand"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"net"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"time"

	"github.com/jackc/pgx/v5"
)

const (
	// Database and Role are what URL connects to and as.
	Database = "qtally"
	Role     = "qtally"

	// socketPort names the socket file (.s.PGSQL.<port>) when the server
	// listens on no TCP port; the socket directory is private, so it never
	// collides.
	socketPort = 5432

	readyTimeout = time.Minute
	stopTimeout  = time.Minute

	// Layout of Options.Dir.
	dataDirName   = "data"
	socketDirName = "run"
	passwordName  = "password"
)

// Options configures Start.
type Options struct {
	// Dir is the directory the server owns: cluster, socket directory and TCP
	// password live in it. A cluster already initialised there is reused, so
	// its data survives restarts. Empty: a temporary directory that Stop
	// removes.
	Dir string
	// Durable keeps PostgreSQL's crash-safety defaults. False turns off fsync,
	// synchronous_commit and full_page_writes: much faster, and fine for data
	// that may be lost when the machine crashes.
	Durable bool
	// Port 0 listens on the unix socket only; -1 picks a free port on
	// 127.0.0.1; a positive port listens on that port on 127.0.0.1. TCP
	// connections need the password kept in Dir; the socket needs none.
	Port int
	// Log, when set, receives initdb's and the server's output.
	Log io.Writer
}

// Server is a PostgreSQL server running as a child process.
type Server struct {
	dir      string
	tempDir  bool // Stop removes dir
	durable  bool
	port     int // resolved TCP port; 0 for socket only
	password string
	bin      string
	owner    *account // nil: runs as the caller
	log      io.Writer

	mu   sync.Mutex
	proc *process // nil while halted
	tail *tail    // log of the current run
}

// Start starts a server on opts.Dir, initialising a cluster there first if
// none exists, and returns once database Database accepts connections.
func Start(ctx context.Context, opts Options) (*Server, error) {
	if opts.Port < -1 || opts.Port > 65535 {
		return nil, fmt.Errorf("localpg: invalid port %d", opts.Port)
	}
	bin, err := FindBinaries()
	if err != nil {
		return nil, err
	}
	owner, err := serverAccount()
	if err != nil {
		return nil, fmt.Errorf("localpg: %w", err)
	}
	s := &Server{durable: opts.Durable, port: opts.Port, bin: bin, owner: owner, log: opts.Log}
	if opts.Dir == "" {
		if s.dir, err = os.MkdirTemp("", "qtally-pg-"); err != nil {
			return nil, fmt.Errorf("localpg: %w", err)
		}
		s.tempDir = true
	} else if s.dir, err = filepath.Abs(opts.Dir); err == nil {
		err = s.makeDirs(s.dir)
	}
	if err == nil {
		err = s.prepare(ctx)
	}
	if err == nil {
		err = s.startPickingPort(ctx)
	}
	if err != nil {
		if s.tempDir {
			err = errors.Join(err, os.RemoveAll(s.dir))
		}
		return nil, fmt.Errorf("localpg: %w", err)
	}
	return s, nil
}

// makeDirs creates dir and any missing parents and hands those it created
// to the server account, which must be able to reach its data.
func (s *Server) makeDirs(dir string) error {
	var missing []string
	for d := dir; ; d = filepath.Dir(d) {
		if _, err := os.Stat(d); err == nil {
			break
		} else if !errors.Is(err, fs.ErrNotExist) {
			return err
		}
		missing = append(missing, d)
	}
	for i := len(missing) - 1; i >= 0; i-- {
		if err := os.Mkdir(missing[i], 0o755); err != nil && !errors.Is(err, fs.ErrExist) {
			return err
		}
		if err := s.owner.own(missing[i]); err != nil {
			return err
		}
	}
	return nil
}

// prepare readies Dir: owned by the server account, a socket directory, a
// password, and an initialised cluster.
func (s *Server) prepare(ctx context.Context) error {
	if err := s.owner.own(s.dir); err != nil {
		return err
	}
	sock := s.socketDir()
	if err := os.Mkdir(sock, 0o700); err != nil && !errors.Is(err, fs.ErrExist) {
		return err
	}
	if err := s.owner.own(sock); err != nil {
		return err
	}
	if err := s.loadPassword(); err != nil {
		return err
	}
	if _, err := os.Stat(filepath.Join(s.dataDir(), "PG_VERSION")); err == nil {
		return nil
	} else if !errors.Is(err, fs.ErrNotExist) {
		return err
	}
	return s.initdb(ctx)
}

// loadPassword reads the TCP password, creating it on first use so that a
// reused Dir keeps the URL it had.
func (s *Server) loadPassword() error {
	path := filepath.Join(s.dir, passwordName)
	b, err := os.ReadFile(path)
	if err == nil {
		s.password = strings.TrimSpace(string(b))
		return nil
	}
	if !errors.Is(err, fs.ErrNotExist) {
		return err
	}
	s.password = rand.Text()
	if err := os.WriteFile(path, []byte(s.password+"\n"), 0o600); err != nil {
		return err
	}
	// initdb, running as the server account, reads it.
	return s.owner.own(path)
}

// initdbFlags are the cluster-shaping initdb flags; with the binaries they
// key the cluster cache.
var initdbFlags = []string{
	"-U", Role,
	// The socket directory is private to the server account (and root), so
	// the socket may trust; TCP needs the password.
	"--auth-local=trust", "--auth-host=scram-sha-256",
	"--encoding=UTF8", "--locale=C",
	"--no-instructions",
}

// initdb builds the cluster beside its final place and renames it, so an
// interrupted initdb never leaves a half-made cluster that looks reusable.
// Throwaway servers copy a cached cluster when there is one: initdb takes
// seconds, a copy a fraction of that.
func (s *Server) initdb(ctx context.Context) error {
	staging := s.dataDir() + ".init"
	if err := os.RemoveAll(staging); err != nil {
		return err
	}
	var cache string
	if !s.durable {
		cache = clusterCache(s.bin)
		if cache != "" {
			if err := copyTree(cache, staging, s.owner); err == nil {
				return os.Rename(staging, s.dataDir())
			}
			// A miss, or a copy gone wrong: build it instead.
			if err := os.RemoveAll(staging); err != nil {
				return err
			}
		}
	}
	args := append([]string{"-D", staging, "--pwfile=" + filepath.Join(s.dir, passwordName)}, initdbFlags...)
	if !s.durable {
		args = append(args, "--no-sync")
	}
	out := &tail{}
	p, err := spawn(s.command(ctx, "initdb", args, out))
	if err == nil {
		err = p.wait()
	}
	if err != nil {
		return fmt.Errorf("initdb: %w%s", err, s.rootHint(err, out))
	}
	if cache != "" {
		publishCluster(staging, cache)
	}
	return os.Rename(staging, s.dataDir())
}

// command runs a PostgreSQL binary as the server account, with the server's
// directory as working directory (the caller's may be unreadable to it).
func (s *Server) command(ctx context.Context, name string, args []string, out *tail) *exec.Cmd {
	cmd := exec.CommandContext(ctx, filepath.Join(s.bin, name), args...)
	cmd.Dir = s.dir
	var w io.Writer = out
	if s.log != nil {
		w = io.MultiWriter(out, s.log)
	}
	cmd.Stdout, cmd.Stderr = w, w
	// Server processes inherit the output pipe; don't let one that outlives
	// the postmaster hold Wait forever.
	cmd.WaitDelay = 5 * time.Second
	cmd.SysProcAttr = &syscall.SysProcAttr{
		Credential: s.owner.credential(),
		// A crashed parent must not leave a server behind; SIGTERM is a smart
		// shutdown, which finishes once the parent's connections are gone.
		Pdeathsig: syscall.SIGTERM,
		// Out of the terminal's process group, so Ctrl-C reaches only the
		// parent, which stops the server after it has finished with it.
		Setpgid: true,
	}
	return cmd
}

// rootHint explains a permission failure when running as another user, plus
// whatever the program printed.
func (s *Server) rootHint(err error, out *tail) string {
	var msg string
	if s.owner != nil && errors.Is(err, fs.ErrPermission) {
		msg = fmt.Sprintf(" (running as root, PostgreSQL runs as user %s, which must be able to reach %s)", s.owner.name, s.dir)
	}
	if log := out.String(); log != "" {
		msg += "\n" + log
	}
	return msg
}

// errPortTaken means the TCP port was bound by someone else.
var errPortTaken = errors.New("port already in use")

// startPickingPort starts the server; for Port -1 it picks a free port, and
// picks again if another process takes it first.
func (s *Server) startPickingPort(ctx context.Context) error {
	if s.port != -1 {
		return s.start(ctx)
	}
	var err error
	for range 3 {
		if s.port, err = freePort(); err != nil {
			return err
		}
		if err = s.start(ctx); !errors.Is(err, errPortTaken) {
			return err
		}
	}
	return err
}

func freePort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, fmt.Errorf("pick a free port: %w", err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}

// start runs postgres on the prepared Dir and waits until it is usable. The
// caller holds mu or has the Server to itself.
func (s *Server) start(ctx context.Context) error {
	listen, port := "", socketPort
	if s.port > 0 {
		listen, port = "127.0.0.1", s.port
	}
	args := []string{
		"-D", s.dataDir(),
		"-c", "unix_socket_directories=" + s.socketDir(),
		"-c", "listen_addresses=" + listen,
		"-c", "port=" + strconv.Itoa(port),
		"-c", "max_connections=200",
		"-c", "shared_buffers=256MB",
	}
	if !s.durable {
		args = append(args, "-c", "fsync=off", "-c", "synchronous_commit=off", "-c", "full_page_writes=off")
	}
	out := &tail{}
	// Not tied to ctx: the server outlives the Start call.
	p, err := spawn(s.command(context.Background(), "postgres", args, out))
	if err != nil {
		return fmt.Errorf("start postgres: %w%s", err, s.rootHint(err, out))
	}
	if err := s.setUp(ctx, p, out); err != nil {
		if !p.exited() {
			err = errors.Join(err, p.shutdown(stopTimeout))
		}
		return err
	}
	s.proc, s.tail = p, out
	return nil
}

// setUp waits for the server to accept connections, then makes sure
// Database exists and Role's password matches the password file.
func (s *Server) setUp(ctx context.Context, p *process, out *tail) error {
	ctx, cancel := context.WithTimeout(ctx, readyTimeout)
	defer cancel()
	var conn *pgx.Conn
	for {
		var err error
		if conn, err = pgx.Connect(ctx, s.socketURL("postgres")); err == nil {
			break
		}
		select {
		case <-p.done:
			if strings.Contains(out.String(), "could not bind") {
				return fmt.Errorf("postgres on port %d: %w\n%s", s.port, errPortTaken, out)
			}
			return fmt.Errorf("postgres exited during startup (%v):\n%s", p.err, out) //nolint:errorlint // an exit status is for reading, not for errors.Is
		case <-ctx.Done():
			return fmt.Errorf("postgres not ready: %w (last error: %v)\n%s", ctx.Err(), err, out) //nolint:errorlint // the timeout is the cause; the last attempt's error is context
		case <-time.After(20 * time.Millisecond):
		}
	}
	defer conn.Close(context.Background())

	var exists bool
	err := conn.QueryRow(ctx, "SELECT EXISTS (SELECT 1 FROM pg_database WHERE datname = $1)", Database).Scan(&exists)
	if err == nil && !exists {
		_, err = conn.Exec(ctx, "CREATE DATABASE "+pgx.Identifier{Database}.Sanitize())
	}
	if err != nil {
		return fmt.Errorf("create database %s: %w", Database, err)
	}
	// The password file wins over whatever the cluster holds, so a Dir whose
	// file was replaced still matches its URL. Utility statements take no
	// parameters, hence the quoted literal.
	quoted := "'" + strings.ReplaceAll(s.password, "'", "''") + "'"
	if _, err := conn.Exec(ctx, "ALTER ROLE "+pgx.Identifier{Role}.Sanitize()+" PASSWORD "+quoted); err != nil {
		return fmt.Errorf("set password of %s: %w", Role, err)
	}
	return nil
}

// URL is a pgx connection URL for database Database as Role: over TCP with
// the password when the server has a port, else over the unix socket.
func (s *Server) URL() string {
	return s.DatabaseURL(Database)
}

// DatabaseURL is like URL for another database on the server, such as the
// maintenance database "postgres".
func (s *Server) DatabaseURL(name string) string {
	if s.port == 0 {
		return s.socketURL(name)
	}
	u := url.URL{
		Scheme:   "postgres",
		User:     url.UserPassword(Role, s.password),
		Host:     net.JoinHostPort("127.0.0.1", strconv.Itoa(s.port)),
		Path:     "/" + name,
		RawQuery: "sslmode=disable",
	}
	return u.String()
}

func (s *Server) socketURL(name string) string {
	q := url.Values{"host": {s.socketDir()}, "port": {strconv.Itoa(s.socketPort())}}
	u := url.URL{Scheme: "postgres", User: url.User(Role), Path: "/" + name, RawQuery: q.Encode()}
	return u.String()
}

// socketPort is the number in the socket file's name, which follows the TCP
// port when there is one.
func (s *Server) socketPort() int {
	if s.port > 0 {
		return s.port
	}
	return socketPort
}

func (s *Server) dataDir() string   { return filepath.Join(s.dir, dataDirName) }
func (s *Server) socketDir() string { return filepath.Join(s.dir, socketDirName) }

// Halt shuts the server down but keeps its directory and port, so Resume can
// start it again on the same data; for tests that take the database away.
func (s *Server) Halt() error {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.proc == nil {
		return nil
	}
	p, out := s.proc, s.tail
	s.proc = nil
	if err := p.shutdown(stopTimeout); err != nil {
		return fmt.Errorf("localpg: stop: %w\n%s", err, out)
	}
	return nil
}

// Resume starts a halted server again with the same data, port and URL.
func (s *Server) Resume(ctx context.Context) error {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.proc != nil {
		return errors.New("localpg: resume: server is running")
	}
	if err := s.start(ctx); err != nil {
		return fmt.Errorf("localpg: resume: %w", err)
	}
	return nil
}

// Restart halts and resumes the server; connections are cut.
func (s *Server) Restart(ctx context.Context) error {
	if err := s.Halt(); err != nil {
		return err
	}
	return s.Resume(ctx)
}

// Stop shuts the server down (fast shutdown: open transactions roll back)
// and removes its directory if Start created it. The Server is done after.
func (s *Server) Stop() error {
	err := s.Halt()
	if s.tempDir {
		if rmErr := os.RemoveAll(s.dir); rmErr != nil {
			err = errors.Join(err, fmt.Errorf("localpg: %w", rmErr))
		}
	}
	return err
}
