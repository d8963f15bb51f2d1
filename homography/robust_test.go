package homography

import (
	"math"
	"math/rand"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// robustScene returns n pixel→pool pairs from a true homography, with
// millimetre noise on the inliers and the pairs at the returned indices
// moved 1–4 m (gross outliers, like a wrong landmark measurement).
func robustScene(t *testing.T, n, outliers int, seed int64) (H, []Point, []Point, map[int]bool) {
	t.Helper()
	truth, err := Solve([]Point{cA, cB, cC, cD}, []Point{{0, 0}, {10, 0}, {10, 5}, {0, 5}})
	require.NoError(t, err)
	rng := rand.New(rand.NewSource(seed))
	src := make([]Point, n)
	dst := make([]Point, n)
	bad := map[int]bool{}
	for len(bad) < outliers {
		bad[rng.Intn(n)] = true
	}
	for i := range src {
		src[i] = Point{110 + 420*rng.Float64(), 110 + 280*rng.Float64()}
		q, ok := truth.Map(src[i])
		require.True(t, ok)
		q.X += 0.001 * rng.NormFloat64()
		q.Y += 0.001 * rng.NormFloat64()
		if bad[i] {
			a := 2 * math.Pi * rng.Float64()
			r := 1 + 3*rng.Float64()
			q.X += r * math.Cos(a)
			q.Y += r * math.Sin(a)
		}
		dst[i] = q
	}
	return truth, src, dst, bad
}

// maxGridError is the largest distance, in pool metres, between where a
// and b send a grid over the pool's pixel outline.
func maxGridError(t *testing.T, a, b H) float64 {
	t.Helper()
	worst := 0.0
	for x := 120.0; x <= 520; x += 40 {
		for y := 110.0; y <= 390; y += 40 {
			p, ok1 := a.Map(Point{x, y})
			q, ok2 := b.Map(Point{x, y})
			require.True(t, ok1 && ok2)
			worst = math.Max(worst, p.Dist(q))
		}
	}
	return worst
}

func TestSolveRobustRejectsOutliers(t *testing.T) {
	tests := []struct {
		name        string
		n, outliers int
		seed        int64
	}{
		{"20 % of 50", 50, 10, 7},
		{"20 % of 20", 20, 4, 11},
		{"no outliers", 12, 0, 3},
		{"40 % of 30", 30, 12, 5},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			truth, src, dst, bad := robustScene(t, tt.n, tt.outliers, tt.seed)
			h, mask, err := SolveRobust(src, dst, 0.02)
			require.NoError(t, err)
			require.Len(t, mask, tt.n)
			for i, in := range mask {
				assert.Equal(t, !bad[i], in, "pair %d", i)
			}
			// 1 mm noise: the refit should be within a few mm of the truth.
			assert.Less(t, maxGridError(t, h, truth), 0.005)
			if tt.outliers > 0 {
				// The plain least-squares fit is pulled off by the outliers,
				// which is why the robust fit exists.
				plain, err := Solve(src, dst)
				require.NoError(t, err)
				assert.Greater(t, maxGridError(t, plain, truth), 0.1)
			}
		})
	}
}

func TestSolveRobustDeterministic(t *testing.T) {
	_, src, dst, _ := robustScene(t, 40, 8, 9)
	h1, m1, err := SolveRobust(src, dst, 0.02)
	require.NoError(t, err)
	h2, m2, err := SolveRobust(src, dst, 0.02)
	require.NoError(t, err)
	assert.Equal(t, h1, h2)
	assert.Equal(t, m1, m2)
}

func TestSolveRobustFourPairs(t *testing.T) {
	pool := []Point{{0, 0}, {10, 0}, {10, 5}, {0, 5}}
	h, mask, err := SolveRobust([]Point{cA, cB, cC, cD}, pool, 0.01)
	require.NoError(t, err)
	assert.Equal(t, []bool{true, true, true, true}, mask)
	want, err := Solve([]Point{cA, cB, cC, cD}, pool)
	require.NoError(t, err)
	assert.Less(t, maxGridError(t, h, want), 1e-9)
}

func TestSolveRobustRejects(t *testing.T) {
	line := []Point{{0, 0}, {1, 1}, {2, 2}, {3, 3}, {4, 4}, {5, 5}}
	sq := []Point{{0, 0}, {1, 0}, {1, 1}, {0, 1}, {0.5, 0.5}, {0.2, 0.7}}
	tests := []struct {
		name     string
		src, dst []Point
		thresh   float64
		wantErr  error
		want     string
	}{
		{"length mismatch", sq, sq[:5], 0.1, nil, "6 source points but 5 destination"},
		{"three pairs", sq[:3], sq[:3], 0.1, nil, "need at least 4 point pairs, have 3"},
		{"zero threshold", sq, sq, 0, nil, "inlier threshold 0"},
		{"all collinear", line, sq, 0.1, ErrTooFewInliers, "best model fits 0 of 6"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, _, err := SolveRobust(tt.src, tt.dst, tt.thresh)
			require.Error(t, err)
			if tt.wantErr != nil {
				assert.ErrorIs(t, err, tt.wantErr)
			}
			assert.Contains(t, err.Error(), tt.want)
		})
	}
}
