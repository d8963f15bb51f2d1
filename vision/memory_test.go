package vision

import (
	"os"
	"runtime"
	"strconv"
	"strings"
	"testing"

	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"
)

// The counters are glibc's own (mallinfo2), read through the shim: a Mat
// of 12 MB, above glibc's mmap threshold of at most 32 MB by default
// (from memory: it starts at 128 KiB and grows with freed blocks up to
// 32 MiB on 64-bit), shows up in use while it lives and not after.
func TestCHeapStatsSeeAMat(t *testing.T) {
	const rows, cols = 2000, 2000 // 12 000 000 bytes of BGR
	before := CHeapStats()
	m := gocv.NewMatWithSize(rows, cols, gocv.MatTypeCV8UC3)
	during := CHeapStats()
	m.Close()
	after := CHeapStats()
	require.GreaterOrEqual(t, int64(during.InUse)-int64(before.InUse), int64(rows*cols*3), "in use while the Mat lives: %+v then %+v", before, during)
	require.GreaterOrEqual(t, int64(during.InUse)-int64(after.InUse), int64(rows*cols*3), "in use after Close: %+v then %+v", during, after)
}

func TestLimitCHeapsRange(t *testing.T) {
	for _, tc := range []struct {
		n  int
		ok bool
	}{{0, false}, {-1, false}, {1 << 20, false}, {2, true}} {
		err := LimitCHeaps(tc.n)
		if tc.ok {
			require.NoError(t, err, "n=%d", tc.n)
		} else {
			require.Error(t, err, "n=%d", tc.n)
		}
	}
}

// Freed memory below the last chunk in use stays resident until trimmed:
// the kernel's own count of the process's resident pages (VmRSS in
// /proc/self/status) must fall by most of it after TrimCHeap.
func TestTrimCHeapGivesPagesBack(t *testing.T) {
	// One OS thread, so that every allocation goes to one arena.
	runtime.LockOSThread()
	defer runtime.UnlockOSThread()
	const n, rows, cols = 600, 100, 300 // 90 000 bytes each, 54 MB in all
	mats := make([]gocv.Mat, n)
	for i := range mats {
		mats[i] = gocv.NewMatWithSizeFromScalar(gocv.NewScalar(1, 2, 3, 0), rows, cols, gocv.MatTypeCV8UC3)
	}
	for _, m := range mats[:n-1] {
		m.Close()
	}
	defer mats[n-1].Close()
	held := vmRSS(t)
	TrimCHeap()
	trimmed := vmRSS(t)
	require.Greater(t, held-trimmed, int64(n*rows*cols*3/2), "resident %d kB before trimming, %d kB after", held/1024, trimmed/1024)
}

// vmRSS is the process's resident size in bytes.
func vmRSS(t *testing.T) int64 {
	t.Helper()
	b, err := os.ReadFile("/proc/self/status")
	require.NoError(t, err)
	for _, line := range strings.Split(string(b), "\n") {
		if v, ok := strings.CutPrefix(line, "VmRSS:"); ok {
			kb, err := strconv.ParseInt(strings.TrimSpace(strings.TrimSuffix(strings.TrimSpace(v), "kB")), 10, 64)
			require.NoError(t, err)
			return kb * 1024
		}
	}
	t.Fatal("no VmRSS in /proc/self/status")
	return 0
}
