package synth

import (
	"fmt"
	"image"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"

	"stillwater/vision/refdata"
)

func cvK(l Lens) gocv.Mat {
	m := gocv.NewMatWithSize(3, 3, gocv.MatTypeCV64F)
	for i, v := range l.K() {
		m.SetDoubleAt(i/3, i%3, v)
	}
	return m
}

func cvDist(l Lens) gocv.Mat {
	m := gocv.NewMatWithSize(1, 5, gocv.MatTypeCV64F)
	for i, v := range l.Dist {
		m.SetDoubleAt(0, i, v)
	}
	return m
}

// TestLensAgainstOpenCV holds the renderer's lens against OpenCV 4.6, the
// reference implementation of the model the labels name, for drawn family
// lenses from mild to the strongest barrel:
//   - forward: cv::initUndistortRectifyMap gives, for each ideal pinhole
//     pixel, the raw pixel OpenCV's model puts it at; the renderer's
//     projection must agree;
//   - back: cv::undistortPoints with the labelled K and coefficients must
//     turn the raw pixels of pool points (corners and a grid over the
//     water) into their pinhole pixels. OpenCV stops its fixed-point
//     inversion after 5 iterations by default, so it is itself approximate
//     where distortion is strong; the figure it reaches is reported.
func TestLensAgainstOpenCV(t *testing.T) {
	type lensCase struct {
		name  string
		scene Scene
	}
	var cases []lensCase
	for _, seed := range []int64{1, 2, 3, 4, 5} {
		s := FamilyScene(seed, Quiet)
		cases = append(cases, lensCase{fmt.Sprintf("seed %d, %.0f°, k1 %.3f", seed, s.Camera.HFOVDeg, s.World.Lens.Dist[0]), s})
	}
	// The widest and most distorted lens the family draws.
	wide := FamilyScene(1, Quiet)
	wide.World.Lens = drawLens(wide.Width, wide.Height, 110, 1, 1, 0.05, 0.03, 0.0015, -0.0015, 0.015, -0.015)
	cases = append(cases, lensCase{"110°, strongest", wide})
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			s, l := tc.scene, tc.scene.World.Lens
			cam := newLensCam(s.Camera, l)
			k, d := cvK(l), cvDist(l)
			defer k.Close()
			defer d.Close()

			// Forward, against OpenCV's map (float32, so about 1e-3 px).
			mx, my := gocv.NewMat(), gocv.NewMat()
			defer mx.Close()
			defer my.Close()
			r := gocv.NewMat()
			defer r.Close()
			gocv.InitUndistortRectifyMap(k, d, r, k, image.Pt(s.Width, s.Height), int(gocv.MatTypeCV32F), mx, my)
			worstF := 0.0
			for v := 0; v < s.Height; v += 7 {
				for u := 0; u < s.Width; u += 7 {
					xd, yd := cam.distort((float64(u)-l.Cx)/l.Fx, (float64(v)-l.Cy)/l.Fy)
					pu, pv := l.Fx*xd+l.Cx, l.Fy*yd+l.Cy
					worstF = math.Max(worstF, math.Hypot(pu-float64(mx.GetFloatAt(v, u)), pv-float64(my.GetFloatAt(v, u))))
				}
			}
			assert.Less(t, worstF, 0.01, "forward model against initUndistortRectifyMap, px")

			// Back: pool points, raw pixels → OpenCV → pinhole pixels.
			var raw, ideal [][2]float64
			for x := 0.0; x <= s.PoolLength+1e-9; x += s.PoolLength / 8 {
				for y := 0.0; y <= s.PoolWidth+1e-9; y += s.PoolWidth / 4 {
					u, v, ok := cam.project(x, y, 0)
					require.True(t, ok)
					pu, pv, _ := cam.pinhole(x, y, 0)
					raw = append(raw, [2]float64{u, v})
					ideal = append(ideal, [2]float64{pu, pv})
					// The renderer's own inverse is exact.
					ray, ok := cam.ray(u, v)
					require.True(t, ok)
					tt := -s.Camera.Height / ray[2]
					assert.InDelta(t, x, s.Camera.X+tt*ray[0], 1e-6)
					assert.InDelta(t, y, s.Camera.Y+tt*ray[1], 1e-6)
				}
			}
			src := gocv.NewMatWithSize(len(raw), 1, gocv.MatTypeCV64FC2)
			defer src.Close()
			for i, p := range raw {
				src.SetDoubleAt(i, 0, p[0])
				src.SetDoubleAt(i, 1, p[1])
			}
			dst := gocv.NewMat()
			defer dst.Close()
			gocv.UndistortPoints(src, &dst, k, d, r, k)
			worst := 0.0
			for i := range raw {
				worst = math.Max(worst, math.Hypot(dst.GetDoubleAt(i, 0)-ideal[i][0], dst.GetDoubleAt(i, 1)-ideal[i][1]))
			}
			refdata.Report(t, "%s: forward differs from OpenCV by %.5f px; undistortPoints recovers the pinhole pool within %.3f px", tc.name, worstF, worst)
			assert.Less(t, worst, 0.05, "undistortPoints on the pool, px")
		})
	}
}

// TestLensHFOV checks the drawn lens spans the field of view it was drawn
// for, and that the distortion never folds back inside the picture.
func TestLensHFOV(t *testing.T) {
	for _, hfov := range []float64{60, 75, 90, 110} {
		for _, strength := range []float64{0, 0.5, 1} {
			for _, size := range [][2]int{{640, 360}, {704, 576}, {1280, 720}} {
				l := drawLens(size[0], size[1], hfov, 1, strength, 0.2, 0, 0, 0, 0, 0)
				c := newLensCam(Pose{Height: 3, PitchDeg: 60}, l)
				assert.InDelta(t, hfov, c.hfov(size[0]), 0.01, "%g° strength %g %v", hfov, strength, size)
				_, _, ok := c.maxRadius(size[0], size[1])
				assert.True(t, ok, "%g° strength %g %v folds", hfov, strength, size)
				assert.LessOrEqual(t, l.Dist[0], 0.0, "barrel")
			}
		}
	}
}
