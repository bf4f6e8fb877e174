package main

import (
	"os"
	"path/filepath"
	"testing"
)

func TestWriteURLFileWritesTheURLWhole(t *testing.T) {
	path := filepath.Join(t.TempDir(), "db-url")
	if err := writeURLFile(path, "postgres://127.0.0.1:5432/x"); err != nil {
		t.Fatalf("writeURLFile: %v", err)
	}
	got, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if string(got) != "postgres://127.0.0.1:5432/x\n" {
		t.Fatalf("url file holds %q", got)
	}
	if _, err := os.Stat(path + ".tmp"); !os.IsNotExist(err) {
		t.Fatalf("temporary file left behind: %v", err)
	}
}

// A failed write must reach the caller: bench.sh would otherwise wait for a
// URL file that never comes.
func TestWriteURLFileReportsAFailedWrite(t *testing.T) {
	path := filepath.Join(t.TempDir(), "missing-dir", "db-url")
	if err := writeURLFile(path, "postgres://127.0.0.1:5432/x"); err == nil {
		t.Fatal("writeURLFile into a missing directory returned nil")
	}
}

// A failed rename must reach the caller too: the temporary file is written,
// but the URL file's name is taken by a directory.
func TestWriteURLFileReportsAFailedRename(t *testing.T) {
	path := filepath.Join(t.TempDir(), "db-url")
	if err := os.Mkdir(path, 0o700); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(path, "keep"), nil, 0o600); err != nil {
		t.Fatal(err)
	}
	if err := writeURLFile(path, "postgres://127.0.0.1:5432/x"); err == nil {
		t.Fatal("writeURLFile onto a non-empty directory returned nil")
	}
}
