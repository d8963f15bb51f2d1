package vision

import (
	"fmt"
	"path/filepath"
	"runtime"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestNoLeakOverTenThousandFrames runs 10 000 frames of a looped 320×240
// clip through Camera.Next with the evidence buffer on and two clips
// recorded, closes the camera, and checks that every Mat was freed and no
// goroutine was left behind. Mat counting needs -tags matprofile: without
// it the test reports itself skipped after its other checks.
func TestNoLeakOverTenThousandFrames(t *testing.T) {
	if testing.Short() {
		t.Skip("10 000 frames; skipped with -short")
	}
	src := smallClip(t, 10)
	dir := t.TempDir()
	runtime.GC()
	mats0 := matsOpen()
	goroutines0 := runtime.NumGoroutine()

	start := time.Now()
	cam, err := OpenCamera(SourceConfig{URI: src, Loop: true}, DetectorConfig{ProcessWidth: 160, LearningRate: -1})
	require.NoError(t, err)
	require.NoError(t, cam.EnableEvidence(EvidenceConfig{PreRoll: time.Second, PostRoll: 2 * time.Second}))
	matsRunning := -1
	for i := 0; i < 10000; i++ {
		_, err := cam.Next(nil)
		require.NoError(t, err, "frame %d", i)
		if i == 5000 {
			matsRunning = matsOpen()
		}
		switch i {
		case 100:
			_, err = cam.StartClip(filepath.Join(dir, "a.avi"))
		case 9000:
			_, err = cam.StartClip(filepath.Join(dir, "b.avi"))
		case 9010:
			// Extend b.avi past the end, so that Close must finish it.
			if err = cam.EnableEvidence(EvidenceConfig{PreRoll: time.Second, PostRoll: time.Hour}); err == nil {
				_, err = cam.StartClip(filepath.Join(dir, "ignored.avi"))
			}
		}
		require.NoError(t, err, "frame %d", i)
	}
	st := cam.Stats()
	require.NoError(t, cam.Close())
	took := time.Since(start)

	runtime.GC()
	assert.Equal(t, mats0, matsOpen(), "Mats left open")
	// Goroutines may take a moment to exit after Close.
	deadline := time.Now().Add(2 * time.Second)
	for runtime.NumGoroutine() > goroutines0 && time.Now().Before(deadline) {
		time.Sleep(10 * time.Millisecond)
	}
	assert.LessOrEqual(t, runtime.NumGoroutine(), goroutines0, "goroutines left running")
	a, _ := countFrames(t, filepath.Join(dir, "a.avi"))
	b, _ := countFrames(t, filepath.Join(dir, "b.avi"))
	// a: 10 pre-roll + 20 post-roll frames; b: 10 pre-roll + every frame
	// from 9001 to 9999.
	assert.Equal(t, 30, a)
	assert.Equal(t, 10+999, b)
	msg := fmt.Sprintf("leak: 10000 frames in %v (%.0f frames/s), %d loops, Mats %d→%d, goroutines %d→%d, clips %d and %d frames",
		took.Round(time.Millisecond), 10000/took.Seconds(), st.Loops, mats0, matsOpen(), goroutines0, runtime.NumGoroutine(), a, b)
	report(t, "%s", msg)
	if _, counting := OpenMats(); !counting {
		t.Skip("SKIPPED the Mat leak check: gocv counts Mats only with -tags matprofile (the README's test command)")
	}
	// The camera holds its model, detector and evidence ring in Mats while
	// it runs: a count that did not rise is not counting.
	assert.Greater(t, matsRunning, mats0, "no Mat counted while the camera ran")
}

// matsOpen is the open Mat count, or 0 when Mats are not counted (without
// -tags matprofile; tests that compare counts skip themselves then).
func matsOpen() int {
	n, _ := OpenMats()
	return n
}
