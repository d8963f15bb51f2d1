package vision

import (
	"runtime"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// The pool size round-trips through OpenCV's own getNumThreads; with no
// count set, OpenCV's documented default is one thread per logical CPU
// (cv::getNumThreads, core/utility.hpp) — Debian's build uses pthreads or
// TBB, both sized so.
func TestSetThreads(t *testing.T) {
	defer SetThreads(0)
	for _, tc := range []struct {
		name string
		n    int
		want int
	}{
		{"one", 1, 1},
		{"two", 2, 2},
		{"default", 0, runtime.NumCPU()},
	} {
		t.Run(tc.name, func(t *testing.T) {
			require.NoError(t, SetThreads(tc.n))
			assert.Equal(t, tc.want, Threads())
		})
	}
	for _, bad := range []int{-1, 4*runtime.NumCPU() + 1} {
		assert.Error(t, SetThreads(bad), "%d threads", bad)
	}
}
