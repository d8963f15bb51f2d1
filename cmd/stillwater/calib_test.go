package main

import (
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/cmd/stillwater/internal/tuning"
	"stillwater/vision/refdata"

	"image"
	"image/png"
	"io"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/homography"
	"stillwater/vision"
	"stillwater/vision/synth"
)

// calibPoses are generator camera poses for an 8 m × 4 m pool: the
// default end camera, the scenario suite's low corner camera at 2.5 m, a
// side camera and a high camera at the deep end.
var calibPoses = []struct {
	name string
	pose synth.Pose
}{
	{"end camera 5 m", synth.Pose{X: -2, Y: 2, Height: 5, YawDeg: 0, PitchDeg: 50, HFOVDeg: 70}},
	{"corner camera 2.5 m", synth.Pose{X: -1.2, Y: -1.0, Height: 2.5, YawDeg: 22, PitchDeg: 24, HFOVDeg: 80}},
	{"side camera 4 m", synth.Pose{X: 4, Y: -3, Height: 4, YawDeg: 90, PitchDeg: 45, HFOVDeg: 90}},
	{"deep-end camera 6 m", synth.Pose{X: 11, Y: 2, Height: 6, YawDeg: 180, PitchDeg: 50, HFOVDeg: 75}},
}

// click projects pool point (x, y, z) through the generator's camera and
// rounds to a whole pixel, as an installer's click or a detector's
// centroid would be.
func click(t *testing.T, s synth.Scene, x, y, z float64) vision.Point {
	t.Helper()
	u, v, ok := s.Project(x, y, z)
	require.True(t, ok, "(%g, %g, %g) behind the camera", x, y, z)
	return vision.Point{X: math.Round(u), Y: math.Round(v)}
}

func sceneFor(p synth.Pose) synth.Scene {
	s := synth.Default()
	s.Camera = p
	return s
}

func cornersConfig(t *testing.T, s synth.Scene, z float64) config.CalibrationConfig {
	L, W := s.PoolLength, s.PoolWidth
	cfg := config.CalibrationConfig{Pool: config.PoolConfig{Length: L, Width: W}, Frame: [2]int{s.Width, s.Height}, Lens: &config.LensConfig{HFOVDeg: s.Camera.HFOVDeg}}
	for _, c := range [][2]float64{{0, 0}, {L, 0}, {L, W}, {0, W}} {
		p := click(t, s, c[0], c[1], z)
		cfg.Corners = append(cfg.Corners, [2]float64{p.X, p.Y})
	}
	return cfg
}

// visibleConfig is cornersConfig when all four corners are in the frame,
// and otherwise a freeform calibration from measured points in view (a
// low camera close to the pool does not see the corners under it).
func visibleConfig(t *testing.T, s synth.Scene) config.CalibrationConfig {
	cfg := cornersConfig(t, s, 0)
	inFrame := func(p [2]float64) bool {
		return p[0] >= 0 && p[1] >= 0 && p[0] <= float64(s.Width) && p[1] <= float64(s.Height)
	}
	all := true
	for _, c := range cfg.Corners {
		all = all && inFrame(c)
	}
	if all {
		return cfg
	}
	cfg.Corners = nil
	for x := 0.5; x < s.PoolLength; x += 1.5 {
		for y := 0.5; y < s.PoolWidth; y += 1.5 {
			p := click(t, s, x, y, 0)
			if inFrame([2]float64{p.X, p.Y}) {
				cfg.Reference = append(cfg.Reference, config.ReferencePoint{Pixel: [2]float64{p.X, p.Y}, Pool: [2]float64{x, y}})
			}
		}
	}
	for _, q := range [][2]float64{{0.5, 0.5}, {7.5, 0.5}, {7.5, 3.5}, {0.5, 3.5}} {
		p := click(t, s, q[0], q[1], 0)
		cfg.Outline = append(cfg.Outline, [2]float64{math.Max(0, math.Min(p.X, float64(s.Width))), math.Max(0, math.Min(p.Y, float64(s.Height)))})
	}
	return cfg
}

// TestCalibrationPoseAndRefraction is the acceptance check of the
// calibration chain on generator geometry.
//
// What is checked against what: the generator (vision/synth) projects
// points with its own pinhole camera and, for submerged points, finds the
// surface crossing with the vector form of Snell's law and a bisection
// (synth.Scene.Apparent). The calibration under test sees only the four
// clicked corner pixels, the field of view and the depth profile; it
// estimates the camera pose from the homography (homography.EstimatePose)
// and bends sight lines with the tangent form of Snell's law
// (homography.RefractToFloor, index 1.333 from the CRC Handbook). The two
// share no code.
func TestCalibrationPoseAndRefraction(t *testing.T) {
	// A floor sloping from 1.0 m at the shallow end to 2.0 m at the deep
	// end, inside the usual residential range (common practice).
	shallow, deep := 1.0, 2.0
	for _, tc := range calibPoses {
		t.Run(tc.name, func(t *testing.T) {
			s := sceneFor(tc.pose)
			cfg := visibleConfig(t, s)
			t.Logf("%d corners, %d reference points", len(cfg.Corners), len(cfg.Reference))
			deepX := s.PoolLength
			cfg.Water = config.WaterConfig{Shallow: shallow, Deep: deep, DeepX: &deepX}
			require.NoError(t, config.ValidateCalibration("cameras[0] (test)", cfg))
			cal, err := config.NewCalibration(config.CameraConfig{ID: "test", CalibrationConfig: cfg})
			require.NoError(t, err)

			// Pose: height within 10 % of the generator's.
			herr := math.Abs(camOf(cal).Height-tc.pose.Height) / tc.pose.Height
			refdata.Report(t, "camera estimated at (%.2f, %.2f) m, %.3f m up; generator (%.2f, %.2f) m, %.2f m: height error %.1f %%",
				camOf(cal).X, camOf(cal).Y, camOf(cal).Height, tc.pose.X, tc.pose.Y, tc.pose.Height, 100*herr)
			assert.LessOrEqual(t, herr, 0.10, "relative height error")

			var worstSurf, worstOn, worstOff, sumOn, sumOff float64
			n := 0
			for x := 0.5; x < s.PoolLength; x++ {
				for y := 0.5; y < s.PoolWidth; y++ {
					// On the surface: the homography alone.
					got, ok := calSurface(cal, click(t, s, x, y, 0))
					require.True(t, ok)
					worstSurf = math.Max(worstSurf, got.Dist(homography.Point{X: x, Y: y}))

					// On the floor at (x, y): drawn where the camera sees it.
					d := shallow + (deep-shallow)*x/s.PoolLength
					ax, ay, err := s.Apparent(x, y, d)
					require.NoError(t, err)
					seen, ok := calSurface(cal, click(t, s, ax, ay, 0))
					require.True(t, ok)
					f := pipeline.FloorPosition(cal, seen)
					truth := homography.Point{X: x, Y: y}
					on := homography.Point{X: f.X, Y: f.Y}.Dist(truth)
					off := seen.Dist(truth)
					worstOn, worstOff = math.Max(worstOn, on), math.Max(worstOff, off)
					sumOn, sumOff = sumOn+on, sumOff+off
					n++
					assert.InDelta(t, d, f.Depth, 0.05, "depth at (%g, %g)", x, y)
				}
			}
			refdata.Report(t, "surface points: worst error %.3f m (homography only)", worstSurf)
			refdata.Report(t, "floor targets 1.0–2.0 m deep: refraction on worst %.3f m, mean %.3f m; off (surface position taken as floor) worst %.3f m, mean %.3f m",
				worstOn, sumOn/float64(n), worstOff, sumOff/float64(n))
			assert.LessOrEqual(t, worstSurf, 0.05, "surface error, m")
			assert.LessOrEqual(t, worstOn, 0.10, "floor error with refraction, m")
			assert.Greater(t, sumOff, 3*sumOn, "refraction must reduce the floor error well beyond rounding")
		})
	}
}

// TestCalibrationLensDistortion checks that lens correction is applied
// before the homography: the generator's ideal pixels are pushed through
// a barrel-distortion model, and only a calibration told about the lens
// maps them back onto the pool.
func TestCalibrationLensDistortion(t *testing.T) {
	s := sceneFor(calibPoses[0].pose)
	k, err := homography.IntrinsicsFromFOV(s.Camera.HFOVDeg, s.Width, s.Height)
	require.NoError(t, err)
	lens := homography.Lens{Model: homography.LensPinhole, K: k, Dist: []float64{-0.25, 0.08, 0, 0, 0}} // invented barrel lens
	distorted := func(x, y float64) vision.Point {
		u, v, ok := s.Project(x, y, 0)
		require.True(t, ok)
		d := lens.Distort(homography.Point{X: u, Y: v})
		return vision.Point{X: math.Round(d.X), Y: math.Round(d.Y)}
	}
	base := config.CalibrationConfig{Pool: config.PoolConfig{Length: 8, Width: 4}, Frame: [2]int{640, 480}}
	for _, c := range [][2]float64{{0, 0}, {8, 0}, {8, 4}, {0, 4}} {
		p := distorted(c[0], c[1])
		base.Corners = append(base.Corners, [2]float64{p.X, p.Y})
	}
	withLens := base
	withLens.Lens = &config.LensConfig{Fx: k.Fx, Fy: k.Fy, Cx: k.Cx, Cy: k.Cy, Dist: lens.Dist}
	worst := map[string]float64{}
	for name, cfg := range map[string]config.CalibrationConfig{"without lens": base, "with lens": withLens} {
		require.NoError(t, config.ValidateCalibration("cam", cfg))
		cal, err := config.NewCalibration(config.CameraConfig{ID: "t", CalibrationConfig: cfg})
		require.NoError(t, err)
		for x := 0.5; x < 8; x++ {
			for y := 0.5; y < 4; y++ {
				got, ok := calSurface(cal, distorted(x, y))
				require.True(t, ok)
				worst[name] = math.Max(worst[name], got.Dist(homography.Point{X: x, Y: y}))
			}
		}
		if name == "with lens" {
			// The mask follows the curved edges: 16 points an edge.
			assert.Len(t, pipeline.WaterMask(cal), 64)
			assert.InDelta(t, s.Camera.Height, camOf(cal).Height, 0.1*s.Camera.Height, "height from the lens intrinsics")
		}
	}
	t.Logf("barrel lens k1 = -0.25: worst surface error without lens correction %.3f m, with %.3f m", worst["without lens"], worst["with lens"])
	assert.LessOrEqual(t, worst["with lens"], 0.05)
	assert.Greater(t, worst["without lens"], 3*worst["with lens"])
}

// TestCalibrationCoping: corners clicked on top of the coping, 0.12 m
// above the water (common practice), map the water correctly only when
// the calibration knows it.
func TestCalibrationCoping(t *testing.T) {
	s := sceneFor(calibPoses[2].pose)
	cfg := cornersConfig(t, s, homography.DefaultCopingHeight)
	worst := map[string]float64{}
	for _, on := range []string{"water", "coping"} {
		c := cfg
		c.CornersOn = on
		require.NoError(t, config.ValidateCalibration("cam", c))
		cal, err := config.NewCalibration(config.CameraConfig{ID: "t", CalibrationConfig: c})
		require.NoError(t, err)
		for x := 0.5; x < 8; x++ {
			for y := 0.5; y < 4; y++ {
				got, ok := calSurface(cal, click(t, s, x, y, 0))
				require.True(t, ok)
				worst[on] = math.Max(worst[on], got.Dist(homography.Point{X: x, Y: y}))
			}
		}
		if on == "coping" {
			t.Logf("camera height above the water %.3f m (generator %.2f m)", camOf(cal).Height, s.Camera.Height)
			assert.InDelta(t, s.Camera.Height, camOf(cal).Height, 0.1*s.Camera.Height)
		}
	}
	t.Logf("corners on the coping: worst surface error taken as water-line clicks %.3f m, with corners_on: coping %.3f m", worst["water"], worst["coping"])
	assert.LessOrEqual(t, worst["coping"], 0.05)
	assert.Greater(t, worst["water"], 2*worst["coping"])
}

func TestCalibrationAreaInsideMask(t *testing.T) {
	s := sceneFor(calibPoses[0].pose)
	cal, err := config.NewCalibration(config.CameraConfig{ID: "t", CalibrationConfig: cornersConfig(t, s, 0)})
	require.NoError(t, err)
	// A 1 m × 0.5 m rectangle on the water, traced by its pixels.
	var contour []vision.Point
	for _, q := range [][2]float64{{3, 1}, {4, 1}, {4, 1.5}, {3, 1.5}} {
		u, v, _ := s.Project(q[0], q[1], 0)
		contour = append(contour, vision.Point{X: u, Y: v})
	}
	assert.InDelta(t, 0.5, pipeline.ContourArea(cal, contour), 0.01, "m²")
	assert.True(t, cal.Inside(homography.Point{X: 4, Y: 2}))
	assert.False(t, cal.Inside(homography.Point{X: -0.2, Y: 2}))
	assert.False(t, cal.Inside(homography.Point{X: 4, Y: 4.1}))
	m := pipeline.WaterMask(cal)
	require.Len(t, m, 4)
	for i, c := range cornersConfig(t, s, 0).Corners {
		assert.InDelta(t, c[0], m[i].X, 1e-6)
		assert.InDelta(t, c[1], m[i].Y, 1e-6)
	}
	// Every detector hands the outline to the picture checks: a frozen
	// picture is found by the water not moving, and without the outline
	// the deck's stillness hides it (a frozen family scene went unreported).
	for _, method := range []string{"meanvar", "mog2"} {
		cam := config.CameraConfig{ID: "t", CalibrationConfig: cornersConfig(t, s, 0), Detect: config.MergeDetect(config.DefaultDetect(), config.DetectConfig{Method: method})}
		dc, err := pipeline.DetectorConfig(cam, cal)
		require.NoError(t, err, method)
		assert.Equal(t, m, dc.Mask, method)
	}
	// Without a depth model the floor is the surface.
	f := pipeline.FloorPosition(cal, homography.Point{X: 2, Y: 3})
	assert.Equal(t, [3]float64{2, 3, 0}, [3]float64{f.X, f.Y, f.Depth})
	// Sky above the horizon does not map onto the pool: a low camera far
	// back sees the sky in its top rows.
	low := sceneFor(synth.Pose{X: -8, Y: 2, Height: 3, PitchDeg: 20, HFOVDeg: 70})
	cal, err = config.NewCalibration(config.CameraConfig{ID: "t", CalibrationConfig: cornersConfig(t, low, 0)})
	require.NoError(t, err)
	_, ok := calSurface(cal, vision.Point{X: 320, Y: 0})
	assert.False(t, ok, "sky pixel")
	_, ok = calSurface(cal, vision.Point{X: 320, Y: 479})
	assert.True(t, ok, "deck pixel")
}

// TestCalibrationFreeform: a kidney-shaped pool calibrated from measured
// reference points and an outline.
func TestCalibrationFreeform(t *testing.T) {
	s := sceneFor(calibPoses[0].pose)
	cfg := config.CalibrationConfig{Pool: config.PoolConfig{Length: 8, Width: 4}, Frame: [2]int{640, 480}, Lens: &config.LensConfig{HFOVDeg: 70}, Water: config.WaterConfig{Depth: 1.4}}
	for _, q := range [][2]float64{{0.5, 0.5}, {7.5, 0.3}, {7.8, 3.6}, {0.4, 3.5}, {4, 0.2}, {4.1, 3.8}, {2, 2}} {
		p := click(t, s, q[0], q[1], 0)
		cfg.Reference = append(cfg.Reference, config.ReferencePoint{Pixel: [2]float64{p.X, p.Y}, Pool: q})
	}
	// A rounded outline: an ellipse inscribed in the rectangle.
	for a := 0.0; a < 2*math.Pi-1e-9; a += math.Pi / 12 {
		p := click(t, s, 4+3.9*math.Cos(a), 2+1.9*math.Sin(a), 0)
		cfg.Outline = append(cfg.Outline, [2]float64{p.X, p.Y})
	}
	require.NoError(t, config.ValidateCalibration("cam", cfg))
	cal, err := config.NewCalibration(config.CameraConfig{ID: "t", CalibrationConfig: cfg})
	require.NoError(t, err)
	t.Logf("freeform: %d reference points, RMS %.3f m / %.2f px", cal.Fit().Points, cal.Fit().RMSM, cal.Fit().RMSPx)
	assert.Less(t, cal.Fit().RMSM, 0.03)
	assert.True(t, cal.Inside(homography.Point{X: 4, Y: 2}))
	assert.False(t, cal.Inside(homography.Point{X: 0.3, Y: 0.3}), "corner of the rectangle is outside the ellipse")
	assert.Len(t, pipeline.WaterMask(cal), 24)

	// A mis-measured point is named.
	bad := cfg
	bad.Reference = append([]config.ReferencePoint(nil), cfg.Reference...)
	bad.Reference[4].Pool = [2]float64{5.5, 0.2}
	_, err = config.NewCalibration(config.CameraConfig{ID: "t", CalibrationConfig: bad})
	require.Error(t, err)
	assert.Contains(t, err.Error(), "reference_points[4]")
}

func TestCalibrationErrorsNameTheFix(t *testing.T) {
	s := sceneFor(calibPoses[0].pose)
	good := cornersConfig(t, s, 0)
	mod := func(f func(c *config.CalibrationConfig)) config.CalibrationConfig {
		c := good
		c.Corners = append([][2]float64(nil), good.Corners...)
		f(&c)
		return c
	}
	cases := []struct {
		name    string
		cfg     config.CalibrationConfig
		wantErr string // from validateCalibration or newCalibration
	}{
		{"duplicate corner", mod(func(c *config.CalibrationConfig) { c.Corners[2] = c.Corners[1] }), "corner C duplicates corner B"},
		{"B opposite A", mod(func(c *config.CalibrationConfig) { c.Corners[1], c.Corners[2] = c.Corners[2], c.Corners[1] }), "corner B is diagonally opposite corner A"},
		{"corner outside frame", mod(func(c *config.CalibrationConfig) { c.Corners[3] = [2]float64{700, 100} }), "corners[3] (corner D)"},
		{"three corners", mod(func(c *config.CalibrationConfig) { c.Corners = c.Corners[:3] }), "corners: 3 given"},
		{"bad corners_on", mod(func(c *config.CalibrationConfig) { c.CornersOn = "deck" }), "corners_on"},
		{"coping without corners_on", mod(func(c *config.CalibrationConfig) { c.Coping = 0.12 }), "coping_m: set, but corners_on"},
		{"depth without camera", mod(func(c *config.CalibrationConfig) { c.Lens = nil; c.Water.Depth = 1.2 }), "needs the camera position"},
		{"depth in centimetres", mod(func(c *config.CalibrationConfig) { c.Water.Depth = 120 }), "not feet or centimetres"},
		{"half a slope", mod(func(c *config.CalibrationConfig) { c.Water.Shallow = 1 }), "both shallow_m and deep_m"},
		{"lens without focal length", mod(func(c *config.CalibrationConfig) { c.Lens = &config.LensConfig{Dist: []float64{0.1, 0, 0, 0}} }), "lens: give fx"},
		{"lens wrong coefficient count", mod(func(c *config.CalibrationConfig) {
			c.Lens = &config.LensConfig{Fx: 500, Fy: 500, Cx: 320, Cy: 240, Dist: []float64{0.1, 0}}
		}), "4 or 5 distortion coefficients"},
		{"fisheye needs four", mod(func(c *config.CalibrationConfig) {
			c.Lens = &config.LensConfig{Model: "fisheye", Fx: 500, Fy: 500, Cx: 320, Cy: 240, Dist: []float64{0.1, 0, 0, 0, 0}}
		}), "fisheye model takes 4"},
		{"hfov without frame", mod(func(c *config.CalibrationConfig) { c.Frame = [2]int{} }), "needs frame_px"},
		{"freeform and corners", mod(func(c *config.CalibrationConfig) {
			c.Reference = []config.ReferencePoint{{}, {}, {}, {}}
		}), "both corners and reference_points"},
		{"negative drift", mod(func(c *config.CalibrationConfig) { c.Drift.MaxShift = -1 }), "drift.max_shift_m"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			err := config.ValidateCalibration("cameras[0] (north)", tc.cfg)
			if err == nil {
				_, err = config.NewCalibration(config.CameraConfig{ID: "north", CalibrationConfig: tc.cfg})
			}
			require.Error(t, err)
			assert.Contains(t, err.Error(), tc.wantErr)
			assert.True(t, strings.Contains(err.Error(), "north"), "error names the camera: %v", err)
		})
	}
	require.NoError(t, config.ValidateCalibration("cam", good))

	// Without frame_px a corner the camera does not see may lie outside
	// the picture (the scenario suite's low corner camera has corner D at
	// x < 0); the geometry is still checked.
	far := sceneFor(calibPoses[1].pose)
	out := cornersConfig(t, far, 0)
	out.Frame, out.Lens = [2]int{}, nil
	require.NoError(t, config.ValidateCalibration("cam", out))
	cal, err := config.NewCalibration(config.CameraConfig{ID: "t", CalibrationConfig: out})
	require.NoError(t, err)
	q, ok := calSurface(cal, click(t, far, 6, 2, 0))
	require.True(t, ok)
	assert.InDelta(t, 0, q.Dist(homography.Point{X: 6, Y: 2}), 0.05)
	out.Corners[2] = out.Corners[1]
	_, err = config.NewCalibration(config.CameraConfig{ID: "t", CalibrationConfig: out})
	assert.ErrorContains(t, err, "corner C duplicates corner B")
	out.Corners[2] = [2]float64{1e300, 5}
	_, err = config.NewCalibration(config.CameraConfig{ID: "t", CalibrationConfig: out})
	assert.ErrorContains(t, err, "far beyond any camera frame")
}

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
		sp, ok := calSurface(cal, big.Centroid)
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

// calSurface maps a recorded pixel to pool metres on the water surface.
func calSurface(c *homography.Calibration, p vision.Point) (homography.Point, bool) {
	return c.Surface(homography.Point(p))
}

// camOf returns the calibration's camera centre, pool metres.
func camOf(c *homography.Calibration) homography.Camera {
	cam, _, _ := c.Camera()
	return cam
}
