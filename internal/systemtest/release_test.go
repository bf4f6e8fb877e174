package systemtest

import (
	"bytes"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"testing"
)

// TestReleaseBuildIsStampedAndReproducible runs `make release` twice: once
// here, taking the version and commit from git, and once on a copy of the
// source in another directory, at another time, given the same version,
// commit and SOURCE_DATE_EPOCH. Every file of the two dist folders must be
// byte-identical, the sums must match the files, and the binary must say
// the version and commit it was stamped with.
func TestReleaseBuildIsStampedAndReproducible(t *testing.T) {
	t.Parallel()
	git := func(dir string, args ...string) string {
		t.Helper()
		cmd := exec.Command("git", args...)
		cmd.Dir = dir
		out, err := cmd.Output()
		if err != nil {
			t.Fatalf("git %s: %v", strings.Join(args, " "), err)
		}
		return strings.TrimSpace(string(out))
	}
	wantVersion := git(".", "describe", "--tags", "--always", "--dirty")
	wantCommit := git(".", "rev-parse", "HEAD")
	epoch := git(".", "log", "-1", "--format=%ct")

	release := func(dir, dist string, vars ...string) {
		t.Helper()
		args := append([]string{"--no-print-directory", "release", "DIST=" + dist, "RELEASE_PLATFORMS=linux/amd64"}, vars...)
		cmd := exec.Command("make", args...)
		cmd.Dir = dir
		if out, err := cmd.CombinedOutput(); err != nil {
			t.Fatalf("make %s in %s: %v\n%s", strings.Join(args, " "), dir, err, out)
		}
	}
	first := t.TempDir()
	release(".", first)

	// The copy holds the files git would commit, tracked or not, so the
	// build sees the same source without the repository.
	src := t.TempDir()
	for _, name := range strings.Split(git(".", "ls-files", "-co", "--exclude-standard"), "\n") {
		data, err := os.ReadFile(name)
		if os.IsNotExist(err) {
			continue // deleted in the working tree, not yet committed
		}
		if err != nil {
			t.Fatal(err)
		}
		info, err := os.Stat(name)
		if err != nil {
			t.Fatal(err)
		}
		dst := filepath.Join(src, name)
		if err := os.MkdirAll(filepath.Dir(dst), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(dst, data, info.Mode().Perm()); err != nil {
			t.Fatal(err)
		}
	}
	second := t.TempDir()
	release(src, second, "VERSION="+wantVersion, "COMMIT="+wantCommit, "SOURCE_DATE_EPOCH="+epoch)

	names := func(dir string) []string {
		entries, err := os.ReadDir(dir)
		if err != nil {
			t.Fatal(err)
		}
		var out []string
		for _, e := range entries {
			out = append(out, e.Name())
		}
		return out
	}
	base := "qtally-" + wantVersion + "-linux-amd64"
	want := []string{base, base + ".tar.gz", "sha256sums"}
	if got := names(first); !slices.Equal(got, want) {
		t.Fatalf("make release wrote %q, want %q", got, want)
	}
	if got := names(second); !slices.Equal(got, want) {
		t.Fatalf("the second make release wrote %q, want %q", got, want)
	}
	for _, name := range want {
		a, err := os.ReadFile(filepath.Join(first, name))
		if err != nil {
			t.Fatal(err)
		}
		b, err := os.ReadFile(filepath.Join(second, name))
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(a, b) {
			t.Errorf("%s differs between the two builds (%d and %d bytes): the release is not reproducible", name, len(a), len(b))
		}
	}

	check := exec.Command("sha256sum", "--check", "--strict", "sha256sums")
	check.Dir = first
	if out, err := check.CombinedOutput(); err != nil {
		t.Errorf("sha256sum --check: %v\n%s", err, out)
	}
	sums, err := os.ReadFile(filepath.Join(first, "sha256sums"))
	if err != nil {
		t.Fatal(err)
	}
	if n := strings.Count(string(sums), "\n"); n != 2 {
		t.Errorf("sha256sums lists %d files, want the binary and the archive:\n%s", n, sums)
	}

	out, err := exec.Command(filepath.Join(first, base), "--version").CombinedOutput()
	if err != nil {
		t.Fatalf("%s --version: %v\n%s", base, err, out)
	}
	if got, want := strings.TrimSpace(string(out)), "qtally version "+wantVersion+" (commit "+wantCommit+")"; got != want {
		t.Errorf("--version of the release build says %q, want %q", got, want)
	}

	list, err := exec.Command("tar", "-tzf", filepath.Join(first, base+".tar.gz")).Output()
	if err != nil {
		t.Fatalf("tar -t: %v", err)
	}
	for _, f := range []string{"qtally", "LICENSE", "README.md", "CHANGELOG.md"} {
		if !strings.Contains(string(list), base+"/"+f+"\n") {
			t.Errorf("the archive lacks %s/%s:\n%s", base, f, list)
		}
	}
}
