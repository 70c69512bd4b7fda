// Package sharedtest finds the repository root and the open data sets that
// live beside it (../shared/data), for tests. The data is never copied into
// the repository: a test that needs it skips, with a message, when it is
// absent.
package sharedtest

import (
	"os"
	"path/filepath"
	"testing"
)

// Root returns the repository root: the nearest folder above the working
// directory (a test's package folder) that holds go.mod.
func Root(t testing.TB) string {
	t.Helper()
	dir, err := os.Getwd()
	if err != nil {
		t.Fatal(err)
	}
	for {
		if _, err := os.Stat(filepath.Join(dir, "go.mod")); err == nil {
			return dir
		}
		parent := filepath.Dir(dir)
		if parent == dir {
			t.Fatal("sharedtest: no go.mod above the test's folder")
		}
		dir = parent
	}
}

// Data returns ../shared/data/<rel> beside the repository root, or skips the
// test when it is absent. With rel "" it returns the data folder itself.
func Data(t testing.TB, rel string) string {
	t.Helper()
	p := filepath.Join(Root(t), "..", "shared", "data", rel)
	if _, err := os.Stat(p); err != nil {
		t.Skipf("open data %s is absent (%v): it lives outside the repository at ../shared/data; CI has it", filepath.Join("shared", "data", rel), err)
	}
	return p
}
