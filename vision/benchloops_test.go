package vision

import (
	"context"
	"path/filepath"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"
)

// TestBenchLoops: the yardstick loops read every frame of a clip, stop at
// max, and the plain detector finds the moving frame-number cells of the
// code clip (each frame changes some of them) and nothing on a clip whose
// frames do not change.
func TestBenchLoops(t *testing.T) {
	clip := codeClip(t, 30)
	n, err := DecodeLoop(context.Background(), clip, 0)
	require.NoError(t, err)
	assert.Equal(t, 30, n)
	n, err = DecodeLoop(context.Background(), clip, 12)
	require.NoError(t, err)
	assert.Equal(t, 12, n)

	frames, blobs, err := NaiveLoop(context.Background(), clip, 0, 50)
	require.NoError(t, err)
	assert.Equal(t, 30, frames)
	assert.Positive(t, blobs, "the cells that flip between frames are motion")

	still := smallStill(t)
	frames, blobs, err = NaiveLoop(context.Background(), still, 0, 50)
	require.NoError(t, err)
	assert.Equal(t, 20, frames)
	assert.Zero(t, blobs)

	// Paced at 50 fps, the tenth frame is read no sooner than 9/50 s
	// after the first.
	start := time.Now()
	n, err = DecodeLoopAt(context.Background(), clip, 10, 50)
	require.NoError(t, err)
	assert.Equal(t, 10, n)
	assert.GreaterOrEqual(t, time.Since(start), 180*time.Millisecond)

	_, err = DecodeLoop(context.Background(), "/nonexistent.mp4", 0)
	assert.ErrorContains(t, err, "/nonexistent.mp4")
}

// smallStill writes 20 identical grey frames.
func smallStill(t *testing.T) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), "still.avi")
	w, err := gocv.VideoWriterFile(p, "MJPG", 10, 320, 240, true)
	require.NoError(t, err)
	defer w.Close()
	m := gocv.NewMatWithSizeFromScalar(gocv.NewScalar(90, 120, 60, 0), 240, 320, gocv.MatTypeCV8UC3)
	defer m.Close()
	for i := 0; i < 20; i++ {
		require.NoError(t, w.Write(m))
	}
	return p
}
