package localpg

import (
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"strings"
)

// clusterCache is where a freshly initialised cluster for these binaries is
// kept, or "" when the user has no cache directory. The key covers the
// binaries' identity and initdb's flags, so an upgrade or a flag change
// makes a new entry rather than reusing a mismatched one.
func clusterCache(bin string) string {
	root, err := os.UserCacheDir()
	if err != nil {
		return ""
	}
	h := sha256.New()
	fmt.Fprintln(h, bin, strings.Join(initdbFlags, " "))
	for _, name := range []string{"initdb", "postgres"} {
		info, err := os.Stat(filepath.Join(bin, name))
		if err != nil {
			return ""
		}
		fmt.Fprintln(h, name, info.Size(), info.ModTime().UnixNano())
	}
	return filepath.Join(root, "qtally", "localpg", hex.EncodeToString(h.Sum(nil))[:16])
}

// publishCluster copies a new cluster into the cache. The copy is renamed
// into place whole, so readers never see a partial one, and a concurrent
// publisher of the same entry simply wins. It is best effort: without a
// cache every server runs initdb, which is slower but correct.
func publishCluster(cluster, cache string) {
	if err := os.MkdirAll(filepath.Dir(cache), 0o755); err != nil {
		return
	}
	tmp, err := os.MkdirTemp(filepath.Dir(cache), ".new-")
	if err != nil {
		return
	}
	defer os.RemoveAll(tmp)
	entry := filepath.Join(tmp, "cluster")
	if copyTree(cluster, entry, nil) == nil {
		_ = os.Rename(entry, cache)
	}
}

// copyTree copies the directory src to the new directory dst, keeping
// permissions (PostgreSQL insists on a 0700 or 0750 data directory) and
// giving everything to owner.
func copyTree(src, dst string, owner *account) error {
	return filepath.WalkDir(src, func(path string, d fs.DirEntry, err error) error {
		if err != nil {
			return err
		}
		rel, err := filepath.Rel(src, path)
		if err != nil {
			return err
		}
		target := filepath.Join(dst, rel)
		info, err := d.Info()
		if err != nil {
			return err
		}
		switch {
		case d.IsDir():
			err = os.Mkdir(target, info.Mode().Perm())
		case d.Type().IsRegular():
			err = copyFile(path, target, info.Mode().Perm())
		default:
			return fmt.Errorf("copy %s: not a file or directory", path)
		}
		if err != nil {
			return err
		}
		return owner.own(target)
	})
}

func copyFile(src, dst string, perm fs.FileMode) error {
	in, err := os.Open(src)
	if err != nil {
		return err
	}
	defer in.Close()
	out, err := os.OpenFile(dst, os.O_WRONLY|os.O_CREATE|os.O_EXCL, perm)
	if err != nil {
		return err
	}
	if _, err := io.Copy(out, in); err != nil {
		out.Close()
		return err
	}
	return out.Close()
}
