package homography

import (
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestLensValidate(t *testing.T) {
	k := Intrinsics{Fx: 500, Fy: 500, Cx: 320, Cy: 240}
	cases := []struct {
		name string
		l    Lens
		want string
	}{
		{"pinhole five", Lens{Model: LensPinhole, K: k, Dist: []float64{-0.2, 0.05, 0, 0, 0.01}}, ""},
		{"pinhole four", Lens{Model: LensPinhole, K: k, Dist: []float64{-0.2, 0.05, 0, 0}}, ""},
		{"fisheye", Lens{Model: LensFisheye, K: k, Dist: []float64{0.01, 0, 0, 0}}, ""},
		{"no focal length", Lens{Model: LensPinhole, Dist: []float64{0, 0, 0, 0}}, "positive finite focal lengths"},
		{"unknown model", Lens{Model: "wide", K: k, Dist: []float64{0, 0, 0, 0}}, `model "wide"`},
		{"three coefficients", Lens{Model: LensPinhole, K: k, Dist: []float64{0, 0, 0}}, "4 or 5"},
		{"NaN coefficient", Lens{Model: LensFisheye, K: k, Dist: []float64{0, math.NaN(), 0, 0}}, "coefficient 1"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			err := tc.l.Validate()
			if tc.want == "" {
				require.NoError(t, err)
				return
			}
			require.Error(t, err)
			assert.Contains(t, err.Error(), tc.want)
		})
	}
}

// TestLensHandWorked: with only k1, a point at normalised radius r is
// drawn at r(1 + k1 r²); k1 = -0.2 and r = 0.5 give 0.475 (hand-worked).
// The fisheye model draws angle θ = atan r at θ(1 + k1 θ²).
func TestLensHandWorked(t *testing.T) {
	k := Intrinsics{Fx: 400, Fy: 400, Cx: 300, Cy: 200}
	l := Lens{Model: LensPinhole, K: k, Dist: []float64{-0.2, 0, 0, 0}}
	d := l.Distort(Point{X: 300 + 0.5*400, Y: 200})
	assert.InDelta(t, 300+0.475*400, d.X, 1e-9)
	assert.InDelta(t, 200, d.Y, 1e-9)
	u, err := l.Undistort(d)
	require.NoError(t, err)
	assert.InDelta(t, 500, u.X, 1e-6)

	f := Lens{Model: LensFisheye, K: k, Dist: []float64{0.05, 0, 0, 0}}
	th := math.Atan(0.5)
	d = f.Distort(Point{X: 500, Y: 200})
	assert.InDelta(t, 300+th*(1+0.05*th*th)*400, d.X, 1e-9)
	u, err = f.Undistort(d)
	require.NoError(t, err)
	assert.InDelta(t, 500, u.X, 1e-6)

	// The principal point never moves.
	for _, ln := range []Lens{l, f} {
		u, err := ln.Undistort(Point{X: 300, Y: 200})
		require.NoError(t, err)
		assert.Equal(t, Point{X: 300, Y: 200}, u)
	}
	// Far outside a strong barrel lens's field the model folds over.
	bad := Lens{Model: LensPinhole, K: k, Dist: []float64{-0.5, 0, 0, 0}}
	_, err = bad.Undistort(Point{X: 300 + 5*400, Y: 200})
	assert.Error(t, err)
}

func BenchmarkLensUndistort(b *testing.B) {
	l := Lens{Model: LensPinhole, K: Intrinsics{Fx: 536, Fy: 536, Cx: 342, Cy: 236}, Dist: []float64{-0.266, -0.039, 0.0018, -0.0003, 0.238}}
	for i := 0; i < b.N; i++ {
		if _, err := l.Undistort(Point{X: float64(i % 640), Y: float64(i % 480)}); err != nil {
			b.Fatal(err)
		}
	}
}
