package localpg

import (
	"errors"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
)

// ErrNoBinaries means no PostgreSQL server installation was found.
var ErrNoBinaries = errors.New("PostgreSQL server binaries (initdb, postgres) not found")

// debianBinGlob is where Debian and Ubuntu install server binaries; they are
// usually not on PATH there.
const debianBinGlob = "/usr/lib/postgresql/*/bin"

// FindBinaries returns the directory holding initdb and postgres: the one
// PATH leads to (symlinks resolved), else the newest Debian-style install.
func FindBinaries() (string, error) {
	return findBinaries(debianBinGlob)
}

func findBinaries(installs string) (string, error) {
	if dir, ok := binariesOnPath(); ok {
		return dir, nil
	}
	dirs, err := filepath.Glob(installs)
	if err != nil {
		return "", fmt.Errorf("search %s: %w", installs, err)
	}
	dirs = slices.DeleteFunc(dirs, func(dir string) bool { return !hasBinaries(dir) })
	if len(dirs) == 0 {
		return "", fmt.Errorf("%w on PATH or in %s: install them (Debian/Ubuntu: apt-get install postgresql) or set DATABASE_URL to an existing server", ErrNoBinaries, installs)
	}
	// Versions compare as numbers: 9.6 < 10 < 15.
	slices.SortFunc(dirs, func(a, b string) int { return slices.Compare(installVersion(a), installVersion(b)) })
	return dirs[len(dirs)-1], nil
}

func binariesOnPath() (string, bool) {
	initdb, err := exec.LookPath("initdb")
	if err != nil {
		return "", false
	}
	// Resolve symlinks so postgres is taken from the same installation as initdb.
	real, err := filepath.EvalSymlinks(initdb)
	if err != nil {
		return "", false
	}
	dir := filepath.Dir(real)
	return dir, hasBinaries(dir)
}

func hasBinaries(dir string) bool {
	for _, name := range []string{"initdb", "postgres"} {
		info, err := os.Stat(filepath.Join(dir, name))
		if err != nil || info.IsDir() || info.Mode().Perm()&0o111 == 0 {
			return false
		}
	}
	return true
}

// installVersion extracts "15" from /usr/lib/postgresql/15/bin.
func installVersion(binDir string) []int {
	var parts []int
	for _, field := range strings.Split(filepath.Base(filepath.Dir(binDir)), ".") {
		n, err := strconv.Atoi(field)
		if err != nil {
			return parts
		}
		parts = append(parts, n)
	}
	return parts
}
