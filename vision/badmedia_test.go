package vision

import (
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/vision/refdata"
)

// drain reads a camera to its end in a goroutine and fails the test if that
// takes longer than limit. It returns the frames read and the final error.
func drain(t *testing.T, sc SourceConfig, limit time.Duration) (int, error, CaptureStats) {
	t.Helper()
	type result struct {
		n     int
		err   error
		stats CaptureStats
	}
	done := make(chan result, 1)
	go func() {
		var res result
		defer func() {
			if p := recover(); p != nil {
				res.err = fmt.Errorf("panic: %v", p)
			}
			done <- res
		}()
		cam, err := OpenCamera(sc, DetectorConfig{ProcessWidth: 160})
		if err != nil {
			res.err = err
			return
		}
		defer cam.Close()
		for {
			_, err := cam.Next(nil)
			if err != nil {
				res.err, res.stats = err, cam.Stats()
				return
			}
			res.n++
		}
	}()
	select {
	case r := <-done:
		return r.n, r.err, r.stats
	case <-time.After(limit):
		t.Fatalf("reading %s did not finish within %v", sc.URI, limit)
		return 0, nil, CaptureStats{}
	}
}

// TestBadMedia feeds damaged and truncated files through OpenCamera and
// Next: each must end (io.EOF or an error naming the damage) without a
// panic or a hang.
func TestBadMedia(t *testing.T) {
	// Megamind_bugy.avi: the deliberately damaged copy of Megamind.avi in
	// Debian's opencv-doc examples (OpenCV's FFmpeg regression sample).
	bugy, err := refdata.Path("Megamind_bugy.avi")
	require.NoError(t, err)
	good, err := refdata.Path("Megamind.avi")
	require.NoError(t, err)
	b, err := os.ReadFile(good)
	require.NoError(t, err)
	cut := filepath.Join(t.TempDir(), "Megamind_half.avi")
	require.NoError(t, os.WriteFile(cut, b[:len(b)/2], 0o644))
	gen := smallClip(t, 4)
	g, err := os.ReadFile(gen)
	require.NoError(t, err)
	genCut := filepath.Join(t.TempDir(), "clip_half.avi")
	require.NoError(t, os.WriteFile(genCut, g[:len(g)/2], 0o644))
	junk := filepath.Join(t.TempDir(), "junk.avi")
	require.NoError(t, os.WriteFile(junk, []byte("RIFF not really a video file at all"), 0o644))

	tests := []struct {
		name    string
		path    string
		damaged bool // the end must be reported as damage, not io.EOF
		openErr bool
	}{
		{"intact Megamind.avi", good, false, false},
		{"Megamind_bugy.avi", bugy, false, false},
		{"Megamind.avi cut at half", cut, true, false},
		{"generated clip cut at half", genCut, true, false},
		{"not a video", junk, false, true},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			n, err, st := drain(t, SourceConfig{URI: tc.path, ReadTimeout: 3 * time.Second}, 60*time.Second)
			require.Error(t, err)
			assert.NotContains(t, err.Error(), "panic")
			msg := fmt.Sprintf("%s: %d frames read, stats %+v, end: %v", tc.name, n, st, err)
			report(t, "badmedia: %s", msg)
			switch {
			case tc.openErr:
				assert.ErrorContains(t, err, "open camera")
				assert.Zero(t, n)
			case tc.damaged:
				assert.ErrorIs(t, err, ErrDamagedMedia)
				assert.Positive(t, st.DecodeErrors)
				assert.Positive(t, n)
			default:
				assert.True(t, errors.Is(err, io.EOF), "want io.EOF, got %v", err)
			}
		})
	}
}
