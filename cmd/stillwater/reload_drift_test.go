package main

import (
	"context"
	"io"
	"log/slog"
	"math"
	"path/filepath"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/cmd/stillwater/internal/watch"
	"stillwater/vision"
	"stillwater/vision/synth"
)

// countSink counts the messages a camera watch sends.
type countSink struct{ n int }

func (c *countSink) Send(context.Context, pipeline.Message) error { c.n++; return nil }

// TestReloadedDriftCheckerIsClosed watches a short clip with a
// camera-moved reference frame and a reload queued before the first
// frame, so that the reload swaps in a second drift checker: when the
// clip ends every Mat of both checkers must be closed. Mats are counted
// only with -tags matprofile.
func TestReloadedDriftCheckerIsClosed(t *testing.T) {
	if _, counting := vision.OpenMats(); !counting {
		t.Skip("SKIPPED: gocv counts Mats only with -tags matprofile (the README's test command)")
	}
	s := synth.Default()
	s.Width, s.Height, s.Duration = 320, 240, 2
	truth, clip := cachedClip(t, s)
	first, err := vision.GrabFrame(clip, "", 0)
	require.NoError(t, err)
	ref := filepath.Join(t.TempDir(), "ref.png")
	writePNG(t, ref, first)
	cam := config.CameraConfig{ID: "t", Source: clip, FrameTimeout: config.Duration(config.DefaultFrameTimeout), Detect: config.DefaultDetect(),
		CalibrationConfig: config.CalibrationConfig{Pool: config.PoolConfig{Length: truth.Pool.Length, Width: truth.Pool.Width}, ReferenceFrame: ref}}
	for _, c := range truth.Corners {
		cam.Corners = append(cam.Corners, [2]float64{math.Round(c.Pixel[0]), math.Round(c.Pixel[1])})
	}
	cfg := config.Defaults()
	cfg.Cameras = []config.CameraConfig{cam}
	require.NoError(t, cfg.Validate())
	cam = cfg.Cameras[0]

	before, _ := vision.OpenMats()
	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	out := &countSink{}
	w := watch.New(cam, out, func(time.Time) bool { return true }, time.Now, log, nil, 0, "test", watch.EvidenceSettings{})
	reloaded := cam
	reloaded.Detect.MinArea *= 1.5
	w.Reload <- reloaded
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	require.NoError(t, w.Run(ctx))
	require.Empty(t, w.Reload, "the reload was never taken")
	assert.Equal(t, int64(truth.Frames), w.Nframes.Load(), "frames watched")
	after, _ := vision.OpenMats()
	assert.Equal(t, before, after, "gocv Mats open before and after watching a clip with a reload")
}
