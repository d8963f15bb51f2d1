// Package refdata finds the reference media that deploy/setup unpacks from
// Debian's opencv-doc package (real video, the graffiti homography pair,
// chessboard views), for tests that check stillwater against them.
package refdata

import (
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"testing"
)

// rel is where deploy/setup unpacks the package, from the module root.
const rel = "testdata/cache/opencv-doc/usr/share/doc/opencv-doc/examples/data"

// Path returns the path of a reference file such as "vtest.avi", looking
// up from the working directory for the module root. The error says how
// to fetch the files when they are missing.
func Path(name string) (string, error) {
	dir, err := os.Getwd()
	if err != nil {
		return "", fmt.Errorf("reference data: %w", err)
	}
	for {
		if _, err := os.Stat(filepath.Join(dir, "go.mod")); err == nil {
			break
		}
		up := filepath.Dir(dir)
		if up == dir {
			return "", errors.New("reference data: no go.mod above the working directory")
		}
		dir = up
	}
	p := filepath.Join(dir, rel, name)
	if _, err := os.Stat(p); err != nil {
		return "", fmt.Errorf("reference data %s: %w (run deploy/setup to fetch Debian's opencv-doc examples)", name, err)
	}
	return p, nil
}

// Report logs a measured figure with t.Logf and, when the environment
// variable STILLWATER_REPORT names a file, appends it there as one line,
// so that CI can print the figures of tests that passed (go test shows
// a passing package's output only with -v).
func Report(tb testing.TB, format string, args ...any) {
	tb.Helper()
	line := fmt.Sprintf(format, args...)
	tb.Log(line)
	path := os.Getenv("STILLWATER_REPORT")
	if path == "" {
		return
	}
	f, err := os.OpenFile(path, os.O_APPEND|os.O_CREATE|os.O_WRONLY, 0o644)
	if err != nil {
		tb.Errorf("report: %v", err)
		return
	}
	defer f.Close()
	fmt.Fprintf(f, "%s: %s\n", tb.Name(), line)
}
