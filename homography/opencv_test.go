package homography_test

import (
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"

	"stillwater/homography"
)

// TestSolveMatchesOpenCV checks the DLT against OpenCV's
// getPerspectiveTransform, the reference implementation, on corner sets
// like those an installer clicks.
func TestSolveMatchesOpenCV(t *testing.T) {
	cases := []struct {
		name string
		px   []homography.Point
		m    []homography.Point
	}{
		{"oblique 8x4 pool", []homography.Point{{145, 390}, {229, 42}, {420, 42}, {500, 390}}, []homography.Point{{0, 0}, {8, 0}, {8, 4}, {0, 4}}},
		{"low corner camera", []homography.Point{{12, 470}, {300, 95}, {610, 160}, {630, 452}}, []homography.Point{{0, 0}, {10, 0}, {10, 5}, {0, 5}}},
		{"nearly overhead", []homography.Point{{100, 100}, {540, 104}, {536, 380}, {98, 376}}, []homography.Point{{0, 0}, {12, 0}, {12, 6}, {0, 6}}},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			h, err := homography.Solve(tc.px, tc.m)
			require.NoError(t, err)

			src := make([]gocv.Point2f, 4)
			dst := make([]gocv.Point2f, 4)
			for i := range tc.px {
				src[i] = gocv.Point2f{X: float32(tc.px[i].X), Y: float32(tc.px[i].Y)}
				dst[i] = gocv.Point2f{X: float32(tc.m[i].X), Y: float32(tc.m[i].Y)}
			}
			sv := gocv.NewPoint2fVectorFromPoints(src)
			defer sv.Close()
			dv := gocv.NewPoint2fVectorFromPoints(dst)
			defer dv.Close()
			ref := gocv.GetPerspectiveTransform2f(sv, dv)
			defer ref.Close()
			var want homography.H
			for i := 0; i < 9; i++ {
				want[i] = ref.GetDoubleAt(i/3, i%3)
			}
			want = want.Normalized()
			// Compare where both send a grid of pixels (entries can differ in
			// scale-sensitive ways; mapped points cannot).
			for x := 100.0; x <= 500; x += 50 {
				for y := 100.0; y <= 380; y += 40 {
					p := homography.Point{X: x, Y: y}
					a, ok1 := h.Map(p)
					b, ok2 := want.Map(p)
					require.True(t, ok1 && ok2)
					assert.InDelta(t, b.X, a.X, 1e-3, "x at %v", p)
					assert.InDelta(t, b.Y, a.Y, 1e-3, "y at %v", p)
				}
			}
		})
	}
}
