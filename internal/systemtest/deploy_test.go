package systemtest

import (
	"context"
	"debug/elf"
	"maps"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"

	"github.com/compose-spec/compose-go/v2/loader"
	"github.com/compose-spec/compose-go/v2/types"
	"github.com/jackc/pgx/v5/pgconn"
)

// The image runs qtally as its entrypoint; the deployment files give only
// its arguments.
const imageBinary = "/usr/local/bin/qtally"

// TestDockerfileBuildsStaticNonRootImage checks deploy/Dockerfile as far as
// a machine without a container engine can: it runs the build stage's own
// go install command and checks the result is a static binary that carries
// the version and commit passed in, and that the image runs that binary as non-root
// with a health check and default command the binary accepts.
func TestDockerfileBuildsStaticNonRootImage(t *testing.T) {
	t.Parallel()
	commands := qtallyCommands(t)
	df := readDockerfile(t)
	build, image := df.stages[0], df.stages[len(df.stages)-1]

	// The build stage, run here: its ENV, then its go install line.
	env := map[string]string{}
	for _, e := range build.all("ENV") {
		for k, v := range envAssignments(t, e) {
			env[k] = v
		}
	}
	if env["CGO_ENABLED"] != "0" {
		t.Fatalf("the build stage sets CGO_ENABLED=%q, want 0 for a static binary", env["CGO_ENABLED"])
	}
	var install string
	for _, r := range build.all("RUN") {
		if strings.Contains(r, "go install") {
			install = r
		}
	}
	if install == "" {
		t.Fatal("the build stage has no RUN go install")
	}
	outDir := t.TempDir()
	const testVersion, testCommit = "v0.0.0-imagetest", "0123456789abcdef0123456789abcdef01234567"
	cmd := exec.Command("sh", "-c", install)
	cmd.Env = os.Environ()
	for k, v := range env {
		cmd.Env = append(cmd.Env, k+"="+v)
	}
	// GOBIN last: the image's /out becomes a temporary folder here.
	cmd.Env = append(cmd.Env, "VERSION="+testVersion, "COMMIT="+testCommit, "GOBIN="+outDir)
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("the build stage's %q failed: %v\n%s", install, err, out)
	}
	bin := filepath.Join(outDir, "qtally")
	f, err := elf.Open(bin)
	if err != nil {
		t.Fatalf("the build stage made no ELF binary at %s: %v", bin, err)
	}
	defer f.Close()
	for _, p := range f.Progs {
		if p.Type == elf.PT_INTERP {
			t.Error("the binary names a dynamic loader (PT_INTERP): it is not static")
		}
	}
	if libs, _ := f.ImportedLibraries(); len(libs) > 0 {
		t.Errorf("the binary needs shared libraries %v: it is not static", libs)
	}
	out, err := exec.Command(bin, "--version").CombinedOutput()
	if want := testVersion + " (commit " + testCommit + ")"; err != nil || !strings.Contains(string(out), want) {
		t.Errorf("qtally --version of the built binary says %q (%v), want the VERSION and COMMIT build arguments: %q", out, err, want)
	}

	// The image stage.
	base := strings.Fields(image.from)[0]
	if !strings.HasPrefix(base, "gcr.io/distroless/static") && base != "scratch" {
		t.Errorf("the image is FROM %s, want distroless static or scratch", base)
	}
	copied := image.one(t, "COPY")
	if !strings.HasSuffix(copied, " "+imageBinary) {
		t.Errorf("the image copies %q, want the binary at %s", copied, imageBinary)
	}
	user := image.one(t, "USER")
	uid, _, _ := strings.Cut(user, ":")
	if n, err := strconv.Atoi(uid); err != nil || n == 0 {
		t.Errorf("the image runs as USER %q, want a numeric non-root uid (Kubernetes can then enforce runAsNonRoot)", user)
	}
	entry := execForm(t, "ENTRYPOINT", image.one(t, "ENTRYPOINT"))
	if !slices.Equal(entry, []string{imageBinary}) {
		t.Errorf("ENTRYPOINT is %q, want [%q]", entry, imageBinary)
	}
	serve, ok := parseInvocation(t, commands, "Dockerfile CMD", execForm(t, "CMD", image.one(t, "CMD")))
	if !ok {
		return
	}
	port := serve.listenPort(t, nil)
	var exposed []string
	for _, e := range image.all("EXPOSE") {
		exposed = append(exposed, strings.Fields(e)...)
	}
	if !slices.Contains(exposed, port) {
		t.Errorf("EXPOSE %v lacks %s, where the image's command listens", exposed, port)
	}
	health := image.one(t, "HEALTHCHECK")
	_, probe, ok := strings.Cut(health, "CMD ")
	if !ok {
		t.Fatalf("HEALTHCHECK %s has no CMD", health)
	}
	checkHealthcheckArgs(t, commands, "Dockerfile HEALTHCHECK", execForm(t, "HEALTHCHECK CMD", probe), port)
}

// checkHealthcheckArgs checks a health check that runs the image's binary:
// `qtally healthcheck --url http://127.0.0.1:<port>/readyz`.
func checkHealthcheckArgs(t testing.TB, commands map[string]cliCommand, where string, argv []string, wantPort string) {
	t.Helper()
	if len(argv) < 2 || argv[0] != imageBinary {
		t.Errorf("%s runs %q, want %s healthcheck ... (the image has no shell)", where, argv, imageBinary)
		return
	}
	inv, ok := parseInvocation(t, commands, where, argv[1:])
	if !ok {
		return
	}
	if inv.command.name != "healthcheck" {
		t.Errorf("%s runs qtally %s, want qtally healthcheck", where, inv.command.name)
		return
	}
	u, err := url.Parse(inv.setting(t, "url", nil))
	if err != nil {
		t.Errorf("%s: %v", where, err)
		return
	}
	if u.Hostname() != "127.0.0.1" || u.Port() != wantPort || u.Path != "/readyz" {
		t.Errorf("%s probes %s, want http://127.0.0.1:%s/readyz (where the process listens)", where, u, wantPort)
	}
}

// TestMakefileImagePassesTheDockerfileArgs checks that `make image` builds
// deploy/Dockerfile with exactly the build arguments it declares.
func TestMakefileImagePassesTheDockerfileArgs(t *testing.T) {
	t.Parallel()
	out, err := exec.Command("make", "--no-print-directory", "-n", "image").CombinedOutput()
	if err != nil {
		t.Fatalf("make -n image: %v\n%s", err, out)
	}
	line := strings.TrimSpace(string(out))
	if !strings.HasPrefix(line, "docker build ") || !strings.Contains(line, " -f deploy/Dockerfile ") || !strings.HasSuffix(line, " .") {
		t.Fatalf("make image runs %q, want docker build -f deploy/Dockerfile ... . from the repository root", line)
	}
	var passed []string
	for _, m := range regexp.MustCompile(`--build-arg ([A-Z0-9_]+)=(\S*)`).FindAllStringSubmatch(line, -1) {
		passed = append(passed, m[1])
		if m[2] == "" {
			t.Errorf("make image passes %s empty", m[1])
		}
	}
	declared := readDockerfile(t).args
	slices.Sort(passed)
	slices.Sort(declared)
	if !slices.Equal(passed, declared) {
		t.Errorf("make image passes build arguments %v; deploy/Dockerfile declares %v", passed, declared)
	}
}

// loadCompose loads deploy/compose.yaml as Docker Compose would, schema
// validation and interpolation included.
func loadCompose(t testing.TB, environment map[string]string) (*types.Project, error) {
	t.Helper()
	dir, err := filepath.Abs("deploy")
	if err != nil {
		t.Fatal(err)
	}
	data, err := os.ReadFile(filepath.Join(dir, "compose.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	return loader.LoadWithContext(context.Background(), types.ConfigDetails{
		WorkingDir:  dir,
		ConfigFiles: []types.ConfigFile{{Filename: filepath.Join(dir, "compose.yaml"), Content: data}},
		Environment: environment,
	}, func(o *loader.Options) { o.SetProjectName("qtally", true) })
}

// TestComposeFileRunsRealCommands loads deploy/compose.yaml with the
// Compose loader and checks every qtally service against the binary: its
// command and flags exist, it reads every variable set for it, its ports
// and health check point where it listens, and it starts in order after
// PostgreSQL is healthy and the migration has succeeded.
func TestComposeFileRunsRealCommands(t *testing.T) {
	t.Parallel()
	commands := qtallyCommands(t)
	secrets := map[string]string{"QTALLY_TOKEN_PEPPER": "pepper-for-the-test", "QTALLY_DB_PASSWORD": "db-password-for-the-test",
		"GRAFANA_ADMIN_PASSWORD": "grafana-password-for-the-test"}
	for name := range secrets {
		without := maps.Clone(secrets)
		delete(without, name)
		if _, err := loadCompose(t, without); err == nil || !strings.Contains(err.Error(), name) {
			t.Errorf("compose.yaml loads without %s set (%v); it must refuse to start without the secret", name, err)
		}
	}
	project, err := loadCompose(t, secrets)
	if err != nil {
		t.Fatalf("deploy/compose.yaml: %v", err)
	}
	root, err := filepath.Abs(".")
	if err != nil {
		t.Fatal(err)
	}
	declaredArgs := readDockerfile(t).args

	ran := map[string]string{} // qtally command -> service
	for name, svc := range project.Services {
		if svc.Build == nil {
			continue
		}
		where := "compose service " + name
		if svc.Build.Context != root || svc.Build.Dockerfile != "deploy/Dockerfile" {
			t.Errorf("%s builds %s with %s, want the repository root with deploy/Dockerfile", where, svc.Build.Context, svc.Build.Dockerfile)
		}
		for arg := range svc.Build.Args {
			if !slices.Contains(declaredArgs, arg) {
				t.Errorf("%s passes build argument %s, which deploy/Dockerfile does not declare", where, arg)
			}
		}
		if len(svc.Entrypoint) > 0 {
			t.Errorf("%s overrides the entrypoint with %q; give qtally's arguments in command", where, svc.Entrypoint)
		}
		inv, ok := parseInvocation(t, commands, where, svc.Command)
		if !ok {
			continue
		}
		ran[inv.command.name] = name
		env := map[string]string{}
		for k, v := range svc.Environment {
			if v == nil {
				t.Errorf("%s: %s has no value", where, k)
				continue
			}
			env[k] = *v
		}
		checkEnvRead(t, where, inv.command, slices.Sorted(mapKeys(env)))
		if dsn, ok := env["DATABASE_URL"]; ok {
			checkComposeDatabaseURL(t, project, where, dsn)
		}
		switch inv.command.name {
		case "serve", "worker":
			port := inv.listenPort(t, env)
			for _, p := range svc.Ports {
				if strconv.Itoa(int(p.Target)) != port {
					t.Errorf("%s publishes container port %d; qtally %s listens on %s", where, p.Target, inv.command.name, port)
				}
			}
			if svc.HealthCheck == nil || len(svc.HealthCheck.Test) == 0 || svc.HealthCheck.Test[0] != "CMD" {
				t.Errorf("%s has no exec-form health check (the image has no shell)", where)
			} else {
				checkHealthcheckArgs(t, commands, where+" healthcheck", svc.HealthCheck.Test[1:], port)
			}
			if !dependsOnCommand(project, svc, "migrate", types.ServiceConditionCompletedSuccessfully) {
				t.Errorf("%s does not wait for the migration service to complete successfully", where)
			}
		case "migrate":
			if svc.Restart != "no" && svc.Restart != "" {
				t.Errorf("%s restarts %q; a one-shot migration must not", where, svc.Restart)
			}
			pg, ok := svc.DependsOn["postgres"]
			if !ok || pg.Condition != types.ServiceConditionHealthy {
				t.Errorf("%s does not wait for postgres to be healthy", where)
			}
		}
	}
	for _, want := range []string{"migrate", "serve", "worker"} {
		if _, ok := ran[want]; !ok {
			t.Errorf("no compose service runs qtally %s", want)
		}
	}
	if api, ok := project.Services[ran["serve"]]; ok && !slices.Contains(api.Command, "--no-worker") {
		t.Errorf("compose service %s runs %q: the API should leave training to the workers (--no-worker)", ran["serve"], api.Command)
	}

	pg, ok := project.Services["postgres"]
	if !ok || pg.HealthCheck == nil || len(pg.HealthCheck.Test) == 0 {
		t.Fatal("compose.yaml has no postgres service with a health check")
	}
	// The dashboards' files live beside compose.yaml, written with the dashboards.
	wantMounts := map[string]map[string]string{
		"prometheus": {
			filepath.Join(root, "deploy/prometheus/prometheus.yml"): "/etc/prometheus/prometheus.yml",
			filepath.Join(root, "deploy/prometheus/alerts.yml"):     "/etc/prometheus/alerts.yml",
		},
		"grafana": {
			filepath.Join(root, "deploy/grafana/provisioning"): "/etc/grafana/provisioning",
			filepath.Join(root, "deploy/grafana/dashboards"):   "/var/lib/grafana/dashboards",
		},
	}
	for name, mounts := range wantMounts {
		svc, ok := project.Services[name]
		if !ok {
			t.Errorf("compose.yaml has no %s service", name)
			continue
		}
		got := map[string]string{}
		for _, v := range svc.Volumes {
			got[v.Source] = v.Target
		}
		for src, dst := range mounts {
			if got[src] != dst {
				t.Errorf("compose service %s mounts %v; want %s at %s", name, got, src, dst)
			}
		}
	}
}

// dependsOnCommand reports whether svc waits, with the condition, for a
// service that runs the given qtally command.
func dependsOnCommand(project *types.Project, svc types.ServiceConfig, command, condition string) bool {
	for dep, d := range svc.DependsOn {
		other, ok := project.Services[dep]
		if ok && len(other.Command) > 0 && other.Command[0] == command && d.Condition == condition {
			return true
		}
	}
	return false
}

// checkComposeDatabaseURL checks that a service's DATABASE_URL reaches the
// compose PostgreSQL with the role, password and database it creates.
func checkComposeDatabaseURL(t testing.TB, project *types.Project, where, dsn string) {
	t.Helper()
	cfg, err := pgconn.ParseConfig(dsn)
	if err != nil {
		t.Errorf("%s: DATABASE_URL does not parse: %v", where, err)
		return
	}
	pg, ok := project.Services[cfg.Host]
	if !ok {
		t.Errorf("%s: DATABASE_URL points at host %q, which is no compose service", where, cfg.Host)
		return
	}
	value := func(k string) string {
		if v := pg.Environment[k]; v != nil {
			return *v
		}
		return ""
	}
	if cfg.Port != 5432 || cfg.User != value("POSTGRES_USER") || cfg.Password != value("POSTGRES_PASSWORD") || cfg.Database != value("POSTGRES_DB") {
		t.Errorf("%s: DATABASE_URL is %s@%s:%d/%s; service %s creates role %q (password as set) and database %q on 5432",
			where, cfg.User, cfg.Host, cfg.Port, cfg.Database, cfg.Host, value("POSTGRES_USER"), value("POSTGRES_DB"))
	}
}
