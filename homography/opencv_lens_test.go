package homography_test

import (
	"image"
	"math"
	"os"
	"regexp"
	"strconv"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"

	"stillwater/homography"
	"stillwater/vision/refdata"
)

// ymlMatrix reads the data array of one !!opencv-matrix entry from an
// OpenCV FileStorage YAML file (gocv v0.31 has no FileStorage binding).
func ymlMatrix(t *testing.T, path, key string) []float64 {
	t.Helper()
	b, err := os.ReadFile(path)
	require.NoError(t, err)
	re := regexp.MustCompile(`(?s)\n` + regexp.QuoteMeta(key) + `: !!opencv-matrix.*?data: \[([^\]]*)\]`)
	m := re.FindSubmatch(b)
	require.NotNil(t, m, "%s: no matrix %s", path, key)
	var out []float64
	for _, f := range strings.Split(string(m[1]), ",") {
		v, err := strconv.ParseFloat(strings.TrimSpace(f), 64)
		require.NoError(t, err)
		out = append(out, v)
	}
	return out
}

// leftLens is the calibration of the left01…left14 chessboard views in
// Debian's opencv-doc examples (left_intrinsics.yml: 640×480, 9×6 board,
// 13 views, 0.39 px average reprojection error).
func leftLens(t *testing.T) homography.Lens {
	t.Helper()
	p, err := refdata.Path("left_intrinsics.yml")
	require.NoError(t, err)
	k := ymlMatrix(t, p, "camera_matrix")
	d := ymlMatrix(t, p, "distortion_coefficients")
	require.Len(t, k, 9)
	require.Len(t, d, 5)
	return homography.Lens{Model: homography.LensPinhole, K: homography.Intrinsics{Fx: k[0], Fy: k[4], Cx: k[2], Cy: k[5]}, Dist: d}
}

func kMat(k homography.Intrinsics) gocv.Mat {
	m := gocv.NewMatWithSize(3, 3, gocv.MatTypeCV64F)
	for i, v := range []float64{k.Fx, 0, k.Cx, 0, k.Fy, k.Cy, 0, 0, 1} {
		m.SetDoubleAt(i/3, i%3, v)
	}
	return m
}

func rowMat(v []float64) gocv.Mat {
	m := gocv.NewMatWithSize(1, len(v), gocv.MatTypeCV64F)
	for i, x := range v {
		m.SetDoubleAt(0, i, x)
	}
	return m
}

// cvUndistort runs OpenCV's undistortPoints (or fisheye::undistortPoints)
// with P = K, so the results are pixels like Lens.Undistort's.
func cvUndistort(l homography.Lens, pts []homography.Point) []homography.Point {
	src := pointMat(pts)
	defer src.Close()
	dst := gocv.NewMat()
	defer dst.Close()
	k := kMat(l.K)
	defer k.Close()
	d := rowMat(l.Dist)
	defer d.Close()
	r := gocv.NewMat()
	defer r.Close()
	if l.Model == homography.LensFisheye {
		gocv.FisheyeUndistortPoints(src, &dst, k, d, r, k)
	} else {
		gocv.UndistortPoints(src, &dst, k, d, r, k)
	}
	out := make([]homography.Point, len(pts))
	for i := range pts {
		out[i] = homography.Point{X: dst.GetDoubleAt(i, 0), Y: dst.GetDoubleAt(i, 1)}
	}
	return out
}

// TestLensUndistortMatchesOpenCV compares the pure-Go inverse of the
// distortion models with OpenCV's undistortPoints and
// fisheye::undistortPoints, the reference implementations, over a grid of
// the 640×480 frame.
func TestLensUndistortMatchesOpenCV(t *testing.T) {
	fish := homography.Lens{Model: homography.LensFisheye,
		K:    homography.Intrinsics{Fx: 330, Fy: 330, Cx: 318, Cy: 242},
		Dist: []float64{-0.03, 0.01, -0.004, 0.0006}} // invented, of the size fisheye calibrations give
	mild := homography.Lens{Model: homography.LensPinhole,
		K:    homography.Intrinsics{Fx: 800, Fy: 800, Cx: 320, Cy: 240},
		Dist: []float64{-0.08, 0.02, 0.0005, -0.0003}} // invented, a mild security-camera lens
	cases := []struct {
		name string
		lens homography.Lens
		// OpenCV's pinhole undistortPoints stops after 5 fixed-point
		// iterations, so it is itself approximate where distortion is
		// strong; the fisheye one runs Newton to 1e-8 and must agree closely.
		tol float64 // px
	}{
		{"left_intrinsics.yml", leftLens(t), 0.05},
		{"mild pinhole", mild, 0.01},
		{"fisheye", fish, 0.01},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			require.NoError(t, tc.lens.Validate())
			var pts []homography.Point
			for x := 20.0; x <= 620; x += 50 {
				for y := 20.0; y <= 460; y += 40 {
					pts = append(pts, homography.Point{X: x, Y: y})
				}
			}
			ref := cvUndistort(tc.lens, pts)
			worst, worstRound, worstInner := 0.0, 0.0, 0.0
			for i, p := range pts {
				u, err := tc.lens.Undistort(p)
				require.NoError(t, err, "point %v", p)
				d := u.Dist(ref[i])
				worst = math.Max(worst, d)
				if p.Dist(homography.Point{X: tc.lens.K.Cx, Y: tc.lens.K.Cy}) < 200 {
					worstInner = math.Max(worstInner, d)
				}
				// Round trip through the forward model, which is exact.
				worstRound = math.Max(worstRound, tc.lens.Distort(u).Dist(p))
			}
			t.Logf("%s: largest difference from OpenCV %.4f px (%.5f px within 200 px of the centre); round trip %.2g px", tc.name, worst, worstInner, worstRound)
			assert.Less(t, worst, tc.tol, "difference from OpenCV, px")
			assert.Less(t, worstInner, 0.01, "difference from OpenCV near the centre, px")
			assert.Less(t, worstRound, 1e-6, "distort(undistort(p)) - p, px")
		})
	}
}

// lineResidual returns the RMS perpendicular distance of pts from their
// total-least-squares line, in pixels.
func lineResidual(pts []homography.Point) float64 {
	var mx, my float64
	for _, p := range pts {
		mx += p.X
		my += p.Y
	}
	n := float64(len(pts))
	mx, my = mx/n, my/n
	var sxx, syy, sxy float64
	for _, p := range pts {
		dx, dy := p.X-mx, p.Y-my
		sxx += dx * dx
		syy += dy * dy
		sxy += dx * dy
	}
	// The smaller eigenvalue of the scatter matrix is the residual sum.
	tr, det := sxx+syy, sxx*syy-sxy*sxy
	l := tr/2 - math.Sqrt(math.Max(0, tr*tr/4-det))
	return math.Sqrt(math.Max(0, l) / n)
}

// TestLensStraightensChessboard finds the 9×6 inner corners of Debian's
// opencv-doc chessboard views with OpenCV and checks that undistorting
// them with the views' own calibration (left_intrinsics.yml) makes the
// board's rows and columns straighter: a projected straight line stays
// straight only without distortion.
func TestLensStraightensChessboard(t *testing.T) {
	lens := leftLens(t)
	for _, name := range []string{"left01.jpg", "left12.jpg", "left14.jpg"} {
		t.Run(name, func(t *testing.T) {
			p, err := refdata.Path(name)
			require.NoError(t, err)
			img := gocv.IMRead(p, gocv.IMReadGrayScale)
			defer img.Close()
			require.False(t, img.Empty())
			corners := gocv.NewMat()
			defer corners.Close()
			pattern := image.Pt(9, 6)
			require.True(t, gocv.FindChessboardCorners(img, pattern, &corners, gocv.CalibCBAdaptiveThresh|gocv.CalibCBNormalizeImage), "no chessboard in %s", name)
			gocv.CornerSubPix(img, &corners, image.Pt(11, 11), image.Pt(-1, -1), gocv.NewTermCriteria(gocv.Count+gocv.EPS, 30, 0.01))
			require.Equal(t, 54, corners.Rows())
			raw := make([]homography.Point, 54)
			und := make([]homography.Point, 54)
			for i := range raw {
				v := corners.GetVecfAt(i, 0)
				raw[i] = homography.Point{X: float64(v[0]), Y: float64(v[1])}
				und[i], err = lens.Undistort(raw[i])
				require.NoError(t, err)
			}
			var rawRes, undRes float64
			var lines int
			// Rows of 9 corners, then columns of 6.
			for r := 0; r < 6; r++ {
				rawRes += lineResidual(raw[9*r : 9*r+9])
				undRes += lineResidual(und[9*r : 9*r+9])
				lines++
			}
			for c := 0; c < 9; c++ {
				var a, b []homography.Point
				for r := 0; r < 6; r++ {
					a, b = append(a, raw[9*r+c]), append(b, und[9*r+c])
				}
				rawRes += lineResidual(a)
				undRes += lineResidual(b)
				lines++
			}
			rawRes /= float64(lines)
			undRes /= float64(lines)
			t.Logf("%s: mean line-fit residual raw %.3f px, undistorted %.3f px", name, rawRes, undRes)
			assert.Less(t, undRes, 0.5*rawRes, "undistortion should at least halve the bending of the board's lines")
			assert.Less(t, undRes, 0.3, "undistorted corner lines, px (calibration reports 0.39 px reprojection)")
		})
	}
}
