package main

import (
	"image"
	"image/png"
	"io"
	"math"
	"os"
	"path/filepath"
	"sort"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/cmd/stillwater/internal/testkit"
	"stillwater/cmd/stillwater/internal/tuning"
	"stillwater/homography"
	"stillwater/vision"
	"stillwater/vision/refdata"
	"stillwater/vision/synth"
)

// writePNG saves img for a test.
func writePNG(t *testing.T, path string, img image.Image) {
	t.Helper()
	f, err := os.Create(path)
	require.NoError(t, err)
	require.NoError(t, png.Encode(f, img))
	require.NoError(t, f.Close())
}

// TestDriftCheckerPanAndStill runs the camera-moved check as the daemon
// would, at the default period (5 s of media time) against the first
// frame saved as the reference: a 3° pan (a bumped camera) must be
// reported within 10 s, and the still scenes of the scenario suite (a
// deck walker, night, a cloud with a child, the low corner camera with a
// child; cut to 16 s) never.
func TestDriftCheckerPanAndStill(t *testing.T) {
	pan := synth.Default()
	pan.PanAt, pan.PanDeg = 7, 3
	type tcase struct {
		name  string
		s     synth.Scene
		panAt float64 // 0: never moved
	}
	cases := []tcase{{"pan 3 degrees at 7 s", pan, 7}}
	for _, name := range []string{"deck", "night", "cloud-child", "far-corner"} {
		s, ok := tuning.ScenarioByName(name, 1)
		require.True(t, ok, name)
		cases = append(cases, tcase{"scenario " + name, s, 0})
	}
	duration, every := 16.0, config.Duration(0) // the default period
	if testing.Short() {
		// The pan alone, at 2 s of a 5 s clip, checked every second.
		cases = cases[:1]
		cases[0].name, cases[0].s.PanAt, cases[0].panAt = "pan 3 degrees at 2 s", 2, 2
		duration, every = 5, config.Duration(time.Second)
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			s := tc.s
			s.Duration = duration
			truth, clip := cachedClip(t, s)
			first, err := vision.GrabFrame(clip, "", 0)
			require.NoError(t, err)
			ref := filepath.Join(dir, "ref.png")
			writePNG(t, ref, first)
			cam := config.CameraConfig{ID: "t", Source: clip, CalibrationConfig: config.CalibrationConfig{
				// No frame_px: the corner camera's corner A lies below the frame.
				Pool: config.PoolConfig{Length: truth.Pool.Length, Width: truth.Pool.Width}, ReferenceFrame: ref,
				Drift: config.DriftConfig{Every: every},
			}}
			for _, c := range truth.Corners {
				cam.Corners = append(cam.Corners, [2]float64{math.Round(c.Pixel[0]), math.Round(c.Pixel[1])})
			}
			require.NoError(t, config.ValidateCalibration("cam", cam.CalibrationConfig))
			cal, err := config.NewCalibration(cam)
			require.NoError(t, err)
			chk, err := pipeline.NewDriftChecker(cam, cal)
			require.NoError(t, err)
			defer chk.Close()
			vc, err := vision.OpenCamera(vision.SourceConfig{URI: clip}, vision.DetectorConfig{ProcessWidth: 320})
			require.NoError(t, err)
			defer vc.Close()
			firstMoved := -1.0
			worstStill, stillChecks := 0.0, 0
			for {
				r, err := vc.Next(nil)
				if err == io.EOF {
					break
				}
				require.NoError(t, err)
				if !chk.Due(r.Media) {
					continue
				}
				st := chk.Check(r.Media, vc)
				require.NoError(t, st.Err, "at %v", r.Media)
				at := r.Media.Seconds()
				if tc.panAt == 0 || at < tc.panAt {
					worstStill = math.Max(worstStill, st.ShiftM)
					stillChecks++
					assert.False(t, st.Moved, "at %.1f s: shift %.3f m", at, st.ShiftM)
				} else if st.Moved && firstMoved < 0 {
					firstMoved = at
					refdata.Report(t, "moved reported at %.1f s (%.1f s after the pan): corners shifted %.2f m, %d inliers", at, at-tc.panAt, st.ShiftM, st.Inliers)
				}
			}
			refdata.Report(t, "largest shift while still: %.3f m (threshold %.2f m)", worstStill, config.DefaultDriftMaxShift)
			require.GreaterOrEqual(t, stillChecks, 2, "comparisons while the camera was still")
			if tc.panAt > 0 {
				require.GreaterOrEqual(t, firstMoved, tc.panAt, "pan never reported")
				assert.LessOrEqual(t, firstMoved-tc.panAt, 10.0, "delay, s")
			}
		})
	}
}

// TestRefractionOnRenderedFrames follows a child lying 1.2 m down on the
// floor through rendered frames: the vision package's detector finds its
// blob, the calibration (from the four corner pixels and the field of
// view only) maps the blob centroid to the surface and refracts it down
// to the floor. The truth is the renderer's label: the child's real
// position, which the renderer displaced by its own Snell's-law geometry
// before drawing (synth.Scene.Apparent).
func TestRefractionOnRenderedFrames(t *testing.T) {
	if testing.Short() {
		t.Skip("renders a 12 s clip")
	}
	s := synth.Default()
	s.Duration, s.Ripple, s.Glints = 12, 0.2, 0
	s.Intruders = []synth.Child{{Enter: 2, Path: []synth.Waypoint{{T: 2, X: 2.5, Y: 1.2}, {T: 12, X: 6.5, Y: 2.8}}, AgeMonths: 24, Lying: true, Contrast: 0.8, Depth: 1.2}}
	truth, clip := cachedClip(t, s)
	cfg := config.CalibrationConfig{Pool: config.PoolConfig{Length: 8, Width: 4}, Frame: [2]int{640, 480}, Lens: &config.LensConfig{HFOVDeg: 70}, Water: config.WaterConfig{Depth: 1.2}}
	for _, c := range truth.Corners {
		cfg.Corners = append(cfg.Corners, [2]float64{math.Round(c.Pixel[0]), math.Round(c.Pixel[1])})
	}
	cal, err := config.NewCalibration(config.CameraConfig{ID: "t", CalibrationConfig: cfg})
	require.NoError(t, err)
	vc, err := vision.OpenCamera(vision.SourceConfig{URI: clip}, vision.DetectorConfig{
		ProcessWidth: 640, Method: "mog2", History: 500, Threshold: 16, LearningRate: -1, MinPixels: 6, Mask: pipeline.WaterMask(cal)})
	require.NoError(t, err)
	defer vc.Close()
	var on, off, seen []float64
	for {
		r, err := vc.Next(nil)
		if err == io.EOF {
			break
		}
		require.NoError(t, err)
		occ := truth.PerFrame[r.Index].Intruder
		// Let the background model settle for 3 s of the child's presence.
		if occ == nil || occ.Under == nil || r.Media.Seconds() < 5 || len(r.Blobs) == 0 {
			continue
		}
		big := r.Blobs[0]
		for _, b := range r.Blobs {
			if b.Area > big.Area {
				big = b
			}
		}
		sp, ok := testkit.Surface(cal, big.Centroid)
		require.True(t, ok)
		f := pipeline.FloorPosition(cal, sp)
		real := homography.Point{X: occ.Under.X, Y: occ.Under.Y}
		on = append(on, homography.Point{X: f.X, Y: f.Y}.Dist(real))
		off = append(off, sp.Dist(real))
		seen = append(seen, sp.Dist(homography.Point{X: occ.X, Y: occ.Y}))
	}
	require.Greater(t, len(on), 40, "frames with the child detected")
	mOn, mOff, mSeen := median(on), median(off), median(seen)
	refdata.Report(t, "%d frames: floor error median %.3f m with refraction, %.3f m without; blob vs drawn (apparent) position median %.3f m", len(on), mOn, mOff, mSeen)
	assert.LessOrEqual(t, mOn, 0.10, "floor error with refraction, m")
	assert.Greater(t, mOff, 3*mOn, "refraction off is measurably worse")
}

func median(v []float64) float64 {
	c := append([]float64(nil), v...)
	sort.Float64s(c)
	return c[len(c)/2]
}
