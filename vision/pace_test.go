package vision

import (
	"errors"
	"io"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestRealtimeFileKeepsPace plays the frame-number clip (10 fps) in real
// time to a reader that keeps up: every frame comes, in order, each due
// one frame interval after the one before, and the reader is made to
// wait for them.
func TestRealtimeFileKeepsPace(t *testing.T) {
	clip := codeClip(t, 12)
	cam, err := OpenCamera(SourceConfig{URI: clip, Realtime: true}, DetectorConfig{ProcessWidth: 160})
	require.NoError(t, err)
	defer cam.Close()
	start := time.Now()
	var prev time.Time
	for i := 0; i < 12; i++ {
		r, err := cam.Next(nil)
		require.NoError(t, err)
		n, ok := readCode(cam.frame)
		require.True(t, ok)
		assert.Equal(t, i, n, "frame %d", i)
		assert.Equal(t, i, r.Index)
		if i > 0 {
			assert.Equal(t, 100*time.Millisecond, cam.Captured().Sub(prev), "frame %d is due one frame interval after the last", i)
		}
		prev = cam.Captured()
	}
	// Eleven intervals of 100 ms: a lower bound, which load cannot break.
	assert.GreaterOrEqual(t, time.Since(start), 1100*time.Millisecond, "the reader did not wait for the frames")
	assert.Zero(t, cam.Stats().Dropped)
	_, err = cam.Next(nil)
	assert.ErrorIs(t, err, io.EOF)
}

// TestRealtimeFileBehindIsNotSilent plays the frame-number clip in real
// time to a reader taking 0.25 s per frame, 2.5 times the frame interval,
// once with the catch-up off and once with the default MaxLag. With it
// off the age of the frame searched grows without bound and is seen in
// Captured; with it on, frames are dropped and counted, and every frame of
// the file is either searched (with its own number) or counted as dropped.
func TestRealtimeFileBehindIsNotSilent(t *testing.T) {
	const frames = 40
	clip := codeClip(t, frames)
	run := func(maxLag time.Duration) (searched []int, worst time.Duration, st CaptureStats) {
		cam, err := OpenCamera(SourceConfig{URI: clip, Realtime: true, MaxLag: maxLag}, DetectorConfig{ProcessWidth: 160})
		require.NoError(t, err)
		defer cam.Close()
		for {
			r, err := cam.Next(nil)
			if errors.Is(err, io.EOF) {
				break
			}
			require.NoError(t, err)
			n, ok := readCode(cam.frame)
			require.True(t, ok)
			require.Equal(t, n, r.Index, "a searched frame keeps its number in the file")
			searched = append(searched, n)
			time.Sleep(250 * time.Millisecond)
			worst = max(worst, time.Since(cam.Captured()))
			if len(searched) == 12 && maxLag < 0 {
				break // enough to show the growing age
			}
		}
		return searched, worst, cam.Stats()
	}
	off, offWorst, offSt := run(-1)
	on, onWorst, onSt := run(0)

	// Catch-up off: twelve frames at 0.25 s each, 0.15 s more late each
	// time; the last is at least 11 × 0.15 s late whatever the load.
	assert.Zero(t, offSt.Dropped)
	assert.Greater(t, offWorst, 1500*time.Millisecond, "a reader behind a real-time file must show an old frame")
	for i, n := range off {
		assert.Equal(t, i, n)
	}
	// Catch-up on: nothing vanishes unnoticed.
	assert.Positive(t, onSt.Dropped)
	assert.EqualValues(t, frames, int64(len(on))+onSt.Dropped, "every frame searched or counted as dropped")
	for i := 1; i < len(on); i++ {
		assert.Greater(t, on[i], on[i-1])
	}
	report(t, "pace: reader at 0.25 s per frame of a 10 fps file played in real time: frame age reached %v after 12 frames with catch-up off; with MaxLag 500 ms %d of %d frames dropped, worst age %v",
		offWorst.Round(10*time.Millisecond), onSt.Dropped, frames, onWorst.Round(10*time.Millisecond))
}
