package vision

import (
	"context"
	"testing"

	"github.com/stretchr/testify/require"

	"stillwater/vision/synth"
)

// cachedClip renders s once into the git-ignored render cache
// (synth.CacheDir, keyed by a hash of the scene and the renderer version)
// and returns the clip's path and its labels. Every test and benchmark
// that needs the same scene shares the one file: read it, never write it
// or beside it.
func cachedClip(tb testing.TB, s synth.Scene) (string, synth.Truth) {
	tb.Helper()
	dir, err := synth.CacheDir()
	require.NoError(tb, err)
	clip, _, truth, err := synth.Cached(context.Background(), s, dir)
	require.NoError(tb, err)
	return clip, truth
}
