package homography_test

import (
	"math"
	"math/rand"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"

	"stillwater/homography"
)

// pointMat returns an n×1 two-channel float64 Mat of pts, the layout
// FindHomography takes. The caller closes it.
func pointMat(pts []homography.Point) gocv.Mat {
	m := gocv.NewMatWithSize(len(pts), 1, gocv.MatTypeCV64FC2)
	for i, p := range pts {
		m.SetDoubleAt(i, 0, p.X)
		m.SetDoubleAt(i, 1, p.Y)
	}
	return m
}

// TestSolveRobustMatchesOpenCV checks SolveRobust against OpenCV's
// findHomography with RANSAC, the reference robust solver, on pixel→pool
// pairs with 20 % gross outliers.
func TestSolveRobustMatchesOpenCV(t *testing.T) {
	px := []homography.Point{{145, 390}, {229, 42}, {420, 42}, {500, 390}}
	pool := []homography.Point{{0, 0}, {8, 0}, {8, 4}, {0, 4}}
	truth, err := homography.Solve(px, pool)
	require.NoError(t, err)

	cases := []struct {
		name        string
		n, outliers int
		seed        int64
	}{
		{"40 pairs, 8 outliers", 40, 8, 1},
		{"100 pairs, 20 outliers", 100, 20, 2},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			rng := rand.New(rand.NewSource(tc.seed))
			src := make([]homography.Point, tc.n)
			dst := make([]homography.Point, tc.n)
			for i := range src {
				// Inside the pool's pixel outline, roughly.
				y := 60 + 320*rng.Float64()
				x := 200 + 250*rng.Float64()
				src[i] = homography.Point{X: x, Y: y}
				q, ok := truth.Map(src[i])
				require.True(t, ok)
				q.X += 0.002 * rng.NormFloat64()
				q.Y += 0.002 * rng.NormFloat64()
				if i%5 == 0 {
					q.X += 1 + 2*rng.Float64()
					q.Y -= 1 + 2*rng.Float64()
				}
				dst[i] = q
			}
			const thresh = 0.03 // metres
			h, mask, err := homography.SolveRobust(src, dst, thresh)
			require.NoError(t, err)

			sm := pointMat(src)
			defer sm.Close()
			dm := pointMat(dst)
			defer dm.Close()
			cvMask := gocv.NewMat()
			defer cvMask.Close()
			ref := gocv.FindHomography(sm, &dm, gocv.HomograpyMethodRANSAC, thresh, &cvMask, 2000, 0.995)
			defer ref.Close()
			require.False(t, ref.Empty(), "OpenCV found no homography")
			var want homography.H
			for i := 0; i < 9; i++ {
				want[i] = ref.GetDoubleAt(i/3, i%3)
			}
			want = want.Normalized()

			require.Equal(t, tc.n, cvMask.Rows())
			agree := 0
			for i := range mask {
				if mask[i] == (cvMask.GetUCharAt(i, 0) != 0) {
					agree++
				}
			}
			// Pairs near the threshold may fall either way between two
			// different refits; allow one disagreement in twenty.
			assert.GreaterOrEqual(t, agree, tc.n-tc.n/20, "inlier masks agree on %d of %d", agree, tc.n)

			worst := 0.0
			for x := 220.0; x <= 440; x += 20 {
				for y := 60.0; y <= 380; y += 20 {
					p := homography.Point{X: x, Y: y}
					a, ok1 := h.Map(p)
					b, ok2 := want.Map(p)
					require.True(t, ok1 && ok2)
					worst = math.Max(worst, a.Dist(b))
				}
			}
			// Both fit 2 mm noise; they must agree to well under a centimetre.
			assert.Less(t, worst, 0.01, "largest disagreement with OpenCV, m")
		})
	}
}
