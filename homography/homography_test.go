package homography

import (
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestSolveHandWorked(t *testing.T) {
	tests := []struct {
		name     string
		src, dst []Point
		want     H
	}{
		{
			name: "identity on the unit square",
			src:  []Point{{0, 0}, {1, 0}, {1, 1}, {0, 1}},
			dst:  []Point{{0, 0}, {1, 0}, {1, 1}, {0, 1}},
			want: Identity,
		},
		{
			// A 200×100 px rectangle onto a 10×5 m pool is a pure scale of
			// 0.05 m/px with no translation: worked by hand.
			name: "rectangle scale",
			src:  []Point{{0, 0}, {200, 0}, {200, 100}, {0, 100}},
			dst:  []Point{{0, 0}, {10, 0}, {10, 5}, {0, 5}},
			want: H{0.05, 0, 0, 0, 0.05, 0, 0, 0, 1},
		},
		{
			// Translation by (3, -2) and a swap of axes: u = y + 3, v = x - 2.
			name: "axis swap and shift",
			src:  []Point{{0, 0}, {1, 0}, {1, 1}, {0, 1}},
			dst:  []Point{{3, -2}, {3, -1}, {4, -1}, {4, -2}},
			want: H{0, 1, 3, 1, 0, -2, 0, 0, 1},
		},
		{
			// The unit square onto the trapezoid (0,0),(1,0),(2,2),(0,2)... worked
			// by hand as x' = 2x/(2-y)... is not a homography; instead use the
			// projective map u = x/(1+y), v = y/(1+y): (1,1) → (0.5, 0.5).
			name: "projective",
			src:  []Point{{0, 0}, {1, 0}, {1, 1}, {0, 1}},
			dst:  []Point{{0, 0}, {1, 0}, {0.5, 0.5}, {0, 0.5}},
			want: H{1, 0, 0, 0, 1, 0, 0, 1, 1},
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			h, err := Solve(tt.src, tt.dst)
			require.NoError(t, err)
			for i := range h {
				assert.InDelta(t, tt.want[i], h[i], 1e-9, "element %d of %v", i, h)
			}
		})
	}
}

func TestRoundTripThroughInverse(t *testing.T) {
	px := []Point{{102, 388}, {540, 391}, {470, 120}, {170, 118}}
	m := []Point{{0, 0}, {10, 0}, {10, 5}, {0, 5}}
	h, err := Solve(px, m)
	require.NoError(t, err)
	inv, err := h.Inverse()
	require.NoError(t, err)
	for _, p := range []Point{{300, 250}, {110, 380}, {460, 130}} {
		q, ok := h.Map(p)
		require.True(t, ok)
		back, ok := inv.Map(q)
		require.True(t, ok)
		assert.InDelta(t, p.X, back.X, 1e-6)
		assert.InDelta(t, p.Y, back.Y, 1e-6)
	}
	rms, worst := Reprojection(h, px, m)
	assert.Less(t, rms, 1e-9)
	assert.Less(t, worst, 1e-9)
}

func TestSolveRejectsIllPosed(t *testing.T) {
	tests := []struct {
		name     string
		src, dst []Point
	}{
		{"three points", []Point{{0, 0}, {1, 0}, {1, 1}}, []Point{{0, 0}, {1, 0}, {1, 1}}},
		{"length mismatch", []Point{{0, 0}, {1, 0}, {1, 1}, {0, 1}}, []Point{{0, 0}, {1, 0}, {1, 1}}},
		{"coincident", []Point{{1, 1}, {1, 1}, {1, 1}, {1, 1}}, []Point{{0, 0}, {1, 0}, {1, 1}, {0, 1}}},
		{"collinear", []Point{{0, 0}, {1, 1}, {2, 2}, {3, 3}}, []Point{{0, 0}, {1, 0}, {1, 1}, {0, 1}}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, err := Solve(tt.src, tt.dst)
			assert.Error(t, err)
		})
	}
}

func TestAreaAndScale(t *testing.T) {
	// 0.05 m/px: a 20×20 px square is 1 m × 1 m = 1 m² (hand-worked).
	h := H{0.05, 0, 0, 0, 0.05, 0, 0, 0, 1}
	sq := []Point{{10, 10}, {30, 10}, {30, 30}, {10, 30}}
	assert.InDelta(t, 1.0, MappedArea(h, sq), 1e-12)
	assert.InDelta(t, 400.0, PolygonArea(sq), 1e-12)
	assert.InDelta(t, 0.05, MetresPerPixel(h, Point{7, 9}), 1e-12)

	// Projective case u = x/(1+y), v = y/(1+y): at y = 1 the Jacobian
	// determinant is 1/(1+y)³ = 1/8, so the linear scale is √(1/8).
	p := H{1, 0, 0, 0, 1, 0, 0, 1, 1}
	assert.InDelta(t, math.Sqrt(1.0/8), MetresPerPixel(p, Point{0.3, 1}), 1e-12)
}
