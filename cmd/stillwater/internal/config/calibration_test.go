package config_test

import (
	"math"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/cmd/stillwater/internal/testkit"
	"stillwater/homography"
	"stillwater/vision"
	"stillwater/vision/refdata"
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

func sceneFor(p synth.Pose) synth.Scene {
	s := synth.Default()
	s.Camera = p
	return s
}

func cornersConfig(t *testing.T, s synth.Scene, z float64) config.CalibrationConfig {
	L, W := s.PoolLength, s.PoolWidth
	cfg := config.CalibrationConfig{Pool: config.PoolConfig{Length: L, Width: W}, Frame: [2]int{s.Width, s.Height}, Lens: &config.LensConfig{HFOVDeg: s.Camera.HFOVDeg}}
	for _, c := range [][2]float64{{0, 0}, {L, 0}, {L, W}, {0, W}} {
		p := testkit.Click(t, s, c[0], c[1], z)
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
			p := testkit.Click(t, s, x, y, 0)
			if inFrame([2]float64{p.X, p.Y}) {
				cfg.Reference = append(cfg.Reference, config.ReferencePoint{Pixel: [2]float64{p.X, p.Y}, Pool: [2]float64{x, y}})
			}
		}
	}
	for _, q := range [][2]float64{{0.5, 0.5}, {7.5, 0.5}, {7.5, 3.5}, {0.5, 3.5}} {
		p := testkit.Click(t, s, q[0], q[1], 0)
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
			herr := math.Abs(testkit.CameraOf(cal).Height-tc.pose.Height) / tc.pose.Height
			refdata.Report(t, "camera estimated at (%.2f, %.2f) m, %.3f m up; generator (%.2f, %.2f) m, %.2f m: height error %.1f %%",
				testkit.CameraOf(cal).X, testkit.CameraOf(cal).Y, testkit.CameraOf(cal).Height, tc.pose.X, tc.pose.Y, tc.pose.Height, 100*herr)
			assert.LessOrEqual(t, herr, 0.10, "relative height error")

			var worstSurf, worstOn, worstOff, sumOn, sumOff float64
			n := 0
			for x := 0.5; x < s.PoolLength; x++ {
				for y := 0.5; y < s.PoolWidth; y++ {
					// On the surface: the homography alone.
					got, ok := testkit.Surface(cal, testkit.Click(t, s, x, y, 0))
					require.True(t, ok)
					worstSurf = math.Max(worstSurf, got.Dist(homography.Point{X: x, Y: y}))

					// On the floor at (x, y): drawn where the camera sees it.
					d := shallow + (deep-shallow)*x/s.PoolLength
					ax, ay, err := s.Apparent(x, y, d)
					require.NoError(t, err)
					seen, ok := testkit.Surface(cal, testkit.Click(t, s, ax, ay, 0))
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
				got, ok := testkit.Surface(cal, distorted(x, y))
				require.True(t, ok)
				worst[name] = math.Max(worst[name], got.Dist(homography.Point{X: x, Y: y}))
			}
		}
		if name == "with lens" {
			// The mask follows the curved edges: 16 points an edge.
			assert.Len(t, pipeline.WaterMask(cal), 64)
			assert.InDelta(t, s.Camera.Height, testkit.CameraOf(cal).Height, 0.1*s.Camera.Height, "height from the lens intrinsics")
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
				got, ok := testkit.Surface(cal, testkit.Click(t, s, x, y, 0))
				require.True(t, ok)
				worst[on] = math.Max(worst[on], got.Dist(homography.Point{X: x, Y: y}))
			}
		}
		if on == "coping" {
			t.Logf("camera height above the water %.3f m (generator %.2f m)", testkit.CameraOf(cal).Height, s.Camera.Height)
			assert.InDelta(t, s.Camera.Height, testkit.CameraOf(cal).Height, 0.1*s.Camera.Height)
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
	_, ok := testkit.Surface(cal, vision.Point{X: 320, Y: 0})
	assert.False(t, ok, "sky pixel")
	_, ok = testkit.Surface(cal, vision.Point{X: 320, Y: 479})
	assert.True(t, ok, "deck pixel")
}

// TestCalibrationFreeform: a kidney-shaped pool calibrated from measured
// reference points and an outline.
func TestCalibrationFreeform(t *testing.T) {
	s := sceneFor(calibPoses[0].pose)
	cfg := config.CalibrationConfig{Pool: config.PoolConfig{Length: 8, Width: 4}, Frame: [2]int{640, 480}, Lens: &config.LensConfig{HFOVDeg: 70}, Water: config.WaterConfig{Depth: 1.4}}
	for _, q := range [][2]float64{{0.5, 0.5}, {7.5, 0.3}, {7.8, 3.6}, {0.4, 3.5}, {4, 0.2}, {4.1, 3.8}, {2, 2}} {
		p := testkit.Click(t, s, q[0], q[1], 0)
		cfg.Reference = append(cfg.Reference, config.ReferencePoint{Pixel: [2]float64{p.X, p.Y}, Pool: q})
	}
	// A rounded outline: an ellipse inscribed in the rectangle.
	for a := 0.0; a < 2*math.Pi-1e-9; a += math.Pi / 12 {
		p := testkit.Click(t, s, 4+3.9*math.Cos(a), 2+1.9*math.Sin(a), 0)
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
	q, ok := testkit.Surface(cal, testkit.Click(t, far, 6, 2, 0))
	require.True(t, ok)
	assert.InDelta(t, 0, q.Dist(homography.Point{X: 6, Y: 2}), 0.05)
	out.Corners[2] = out.Corners[1]
	_, err = config.NewCalibration(config.CameraConfig{ID: "t", CalibrationConfig: out})
	assert.ErrorContains(t, err, "corner C duplicates corner B")
	out.Corners[2] = [2]float64{1e300, 5}
	_, err = config.NewCalibration(config.CameraConfig{ID: "t", CalibrationConfig: out})
	assert.ErrorContains(t, err, "far beyond any camera frame")
}
