package homography

import (
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// pinhole is a synthetic camera built in the test: centre (x, y, z) in a
// world frame with z up, looking along yaw (radians from +x) and pitched
// down by pitch (radians), with intrinsics k.
type pinhole struct {
	c          [3]float64
	yaw, pitch float64
	k          Intrinsics
}

// project returns the pixel of world point w and whether it is in front.
func (p pinhole) project(w [3]float64) (Point, bool) {
	f := [3]float64{math.Cos(p.pitch) * math.Cos(p.yaw), math.Cos(p.pitch) * math.Sin(p.yaw), -math.Sin(p.pitch)}
	right := [3]float64{math.Sin(p.yaw), -math.Cos(p.yaw), 0} // f × up, normalised
	down := cross3(f, right)                                  // camera y axis, so x × y = z (forward)
	d := [3]float64{w[0] - p.c[0], w[1] - p.c[1], w[2] - p.c[2]}
	dot := func(a [3]float64) float64 { return a[0]*d[0] + a[1]*d[1] + a[2]*d[2] }
	xc, yc, zc := dot(right), dot(down), dot(f)
	if zc <= 0 {
		return Point{}, false
	}
	return Point{p.k.Fx*xc/zc + p.k.Cx, p.k.Fy*yc/zc + p.k.Cy}, true
}

// pixToPool solves the pixel→pool homography of the camera for a pool of
// the given size; toWorld maps pool metres to the world frame, so a
// mirrored pool frame can be tested.
func (p pinhole) pixToPool(t *testing.T, length, width float64, toWorld func(Point) [3]float64) (H, []Point, []Point) {
	t.Helper()
	pool := []Point{{0, 0}, {length, 0}, {length, width}, {0, width}}
	px := make([]Point, len(pool))
	for i, q := range pool {
		var ok bool
		px[i], ok = p.project(toWorld(q))
		require.True(t, ok, "pool corner %v is behind the synthetic camera", q)
	}
	h, err := Solve(px, pool)
	require.NoError(t, err)
	return h, px, pool
}

func zUp(q Point) [3]float64      { return [3]float64{q.X, q.Y, 0} }
func mirrored(q Point) [3]float64 { return [3]float64{q.X, -q.Y, 0} }

func TestEstimatePoseSyntheticCamera(t *testing.T) {
	fov, err := IntrinsicsFromFOV(70, 640, 480)
	require.NoError(t, err)
	deg := math.Pi / 180
	tests := []struct {
		name      string
		cam       pinhole
		toWorld   func(Point) [3]float64
		wantX     float64 // pool metres
		wantY     float64
		wantH     float64
		wantMirr  bool
		roundPx   bool // round the projected corners to whole pixels, like clicks
		useFOVAPI bool
	}{
		{
			name:    "end camera 5 m up, z-up pool frame",
			cam:     pinhole{c: [3]float64{-2, 2, 5}, yaw: 0, pitch: 50 * deg, k: fov},
			toWorld: zUp, wantX: -2, wantY: 2, wantH: 5, useFOVAPI: true,
		},
		{
			// Pool y runs along world -y, so pool x × y points down.
			name:    "end camera 5 m up, mirrored pool frame",
			cam:     pinhole{c: [3]float64{-2, -2, 5}, yaw: 0, pitch: 50 * deg, k: fov},
			toWorld: mirrored, wantX: -2, wantY: 2, wantH: 5, wantMirr: true, useFOVAPI: true,
		},
		{
			name:    "clicked corners rounded to whole pixels",
			cam:     pinhole{c: [3]float64{-2, 2, 5}, yaw: 0, pitch: 50 * deg, k: fov},
			toWorld: zUp, wantX: -2, wantY: 2, wantH: 5, roundPx: true, useFOVAPI: true,
		},
		{
			name: "corner camera, yawed, off-centre principal point",
			cam: pinhole{c: [3]float64{12, -3, 3.5}, yaw: 150 * deg, pitch: 35 * deg,
				k: Intrinsics{Fx: 820, Fy: 810, Cx: 655, Cy: 350}},
			toWorld: zUp, wantX: 12, wantY: -3, wantH: 3.5,
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			h, px, pool := tt.cam.pixToPool(t, 10, 5, tt.toWorld)
			if tt.roundPx {
				for i := range px {
					px[i] = Point{math.Round(px[i].X), math.Round(px[i].Y)}
				}
				h, err = Solve(px, pool)
				require.NoError(t, err)
			}
			var p Pose
			if tt.useFOVAPI {
				p, err = EstimatePoseFOV(h, 70, 640, 480)
			} else {
				p, err = EstimatePose(h, tt.cam.k)
			}
			require.NoError(t, err)
			// Exact corners leave only rounding: height within 1 %.
			assert.InDelta(t, tt.wantH, p.Height, 0.01*tt.wantH, "height")
			assert.InDelta(t, tt.wantX, p.X, 0.02*tt.wantH, "x")
			assert.InDelta(t, tt.wantY, p.Y, 0.02*tt.wantH, "y")
			assert.Equal(t, tt.wantMirr, p.Mirrored)
			// R must be a rotation: RᵀR = I.
			for i := 0; i < 3; i++ {
				for j := 0; j < 3; j++ {
					var s float64
					for k := 0; k < 3; k++ {
						s += p.R[3*k+i] * p.R[3*k+j]
					}
					want := 0.0
					if i == j {
						want = 1
					}
					assert.InDelta(t, want, s, 1e-9)
				}
			}
		})
	}
}

func TestIntrinsicsFromFOV(t *testing.T) {
	// 90° across 640 px: tan 45° = 1, so f = 320 px (hand-worked).
	k, err := IntrinsicsFromFOV(90, 640, 480)
	require.NoError(t, err)
	assert.InDelta(t, 320, k.Fx, 1e-9)
	assert.InDelta(t, 320, k.Fy, 1e-9)
	assert.Equal(t, 320.0, k.Cx)
	assert.Equal(t, 240.0, k.Cy)

	for _, tc := range []struct {
		name       string
		fov        float64
		w, h       int
		wantSubstr string
	}{
		{"zero fov", 0, 640, 480, "field of view 0°"},
		{"flat fov", 180, 640, 480, "between 0 and 180"},
		{"no image", 70, 0, 480, "image size 0×480"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := IntrinsicsFromFOV(tc.fov, tc.w, tc.h)
			require.Error(t, err)
			assert.Contains(t, err.Error(), tc.wantSubstr)
		})
	}
}

func TestEstimatePoseRejects(t *testing.T) {
	_, err := EstimatePose(Identity, Intrinsics{Fx: 0, Fy: 500})
	require.Error(t, err)
	assert.Contains(t, err.Error(), "positive focal lengths")

	_, err = EstimatePose(H{1, 0, 0, 0, 0, 0, 0, 0, 1}, Intrinsics{Fx: 500, Fy: 500, Cx: 320, Cy: 240})
	require.Error(t, err)
	assert.ErrorIs(t, err, ErrSingular)
}
