package homography

import (
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestRefractHandWorkedSnell(t *testing.T) {
	// Hand-worked from Snell's law with n = 1.333 (CRC Handbook of
	// Chemistry and Physics: 1.33299 for water at 20 °C). At 30° off
	// vertical sin θw = 0.5/1.333, tan θw = 0.405, so the floor point is
	// (tan 30° - 0.405)·D = 0.17·D nearer than the straight sight line; at
	// 45°, (1 - 0.626)·D = 0.37·D; at 45° and D = 1.5 m, 0.56 m.
	tests := []struct {
		name      string
		angleDeg  float64
		depth     float64
		wantShift float64
		delta     float64
	}{
		{"30 degrees, 1 m", 30, 1, 0.17, 0.005},
		{"30 degrees, 2 m", 30, 2, 0.34, 0.01},
		{"45 degrees, 1 m", 45, 1, 0.37, 0.005},
		{"45 degrees, 1.5 m", 45, 1.5, 0.56, 0.005},
	}
	cam := Camera{X: 1, Y: 2, Height: 4}
	dir := Point{0.6, 0.8} // any unit direction away from the camera foot
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			tanAir := math.Tan(tt.angleDeg * math.Pi / 180)
			r := cam.Height * tanAir
			surface := Point{cam.X + r*dir.X, cam.Y + r*dir.Y}
			got, err := Refract(cam, surface, tt.depth, WaterIndex)
			require.NoError(t, err)
			straight := Point{surface.X + tt.depth*tanAir*dir.X, surface.Y + tt.depth*tanAir*dir.Y}
			assert.InDelta(t, tt.wantShift, straight.Dist(got), tt.delta)
			// The floor point lies beyond the surface point, on the same
			// vertical plane through the camera.
			d := got.Sub(surface)
			assert.Greater(t, d.X*dir.X+d.Y*dir.Y, 0.0)
			assert.InDelta(t, 0, d.X*dir.Y-d.Y*dir.X, 1e-12)
		})
	}
}

func TestRefractObeysSnell(t *testing.T) {
	// Independent of the hand numbers: sin θair / sin θw must equal n.
	cam := Camera{X: -2, Y: 2, Height: 5}
	for _, s := range []Point{{0, 0}, {3, 4}, {10, 5}, {-1.9, 2.2}} {
		f, err := Refract(cam, s, 1.2, WaterIndex)
		require.NoError(t, err)
		r := math.Hypot(s.X-cam.X, s.Y-cam.Y)
		sinAir := r / math.Hypot(r, cam.Height)
		w := f.Dist(s)
		sinW := w / math.Hypot(w, 1.2)
		assert.InDelta(t, WaterIndex, sinAir/sinW, 1e-9, "surface point %v", s)
	}
	// Straight down, the ray does not bend.
	f, err := Refract(cam, Point{-2, 2}, 1.5, WaterIndex)
	require.NoError(t, err)
	assert.Equal(t, Point{-2, 2}, f)
}

func TestRefractToFloor(t *testing.T) {
	cam := Camera{X: -2, Y: 2, Height: 5}
	tests := []struct {
		name    string
		prof    DepthProfile
		surface Point
	}{
		{"fixed depth", FixedDepth(1.4), Point{6, 3}},
		{"sloping, looking toward the deep end", LinearFloor(1.0, 2.2, 0, 10), Point{6, 3}},
		{"sloping, deep end nearer the camera", LinearFloor(1.0, 2.2, 10, 0), Point{4, 1}},
		{"beyond the deep end holds the deep depth", LinearFloor(1.0, 2.0, 0, 8), Point{9, 2}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, d, err := RefractToFloor(cam, tt.surface, tt.prof, WaterIndex)
			require.NoError(t, err)
			// Self-consistency: the depth is the floor's depth where the
			// ray lands, and the point is where a ray to that depth lands.
			assert.InDelta(t, tt.prof.At(got.X), d, 1e-8)
			want, err := Refract(cam, tt.surface, d, WaterIndex)
			require.NoError(t, err)
			assert.InDelta(t, want.X, got.X, 1e-8)
			assert.InDelta(t, want.Y, got.Y, 1e-8)
		})
	}
	// A sloping floor must give a different depth from the one directly
	// below the surface point, or the iteration did nothing.
	prof := LinearFloor(1.0, 2.2, 0, 10)
	_, d, err := RefractToFloor(cam, Point{6, 3}, prof, WaterIndex)
	require.NoError(t, err)
	assert.Greater(t, d, prof.At(6)+0.01)
}

func TestProfileAt(t *testing.T) {
	// Hand-worked linear interpolation: halfway from 1 m to 2 m is 1.5 m.
	p := LinearFloor(1, 2, 2, 12)
	assert.InDelta(t, 1.5, p.At(7), 1e-12)
	assert.InDelta(t, 1.0, p.At(-5), 1e-12)
	assert.InDelta(t, 2.0, p.At(20), 1e-12)
	assert.InDelta(t, 1.3, FixedDepth(1.3).At(99), 1e-12)
}

func TestRefractRejects(t *testing.T) {
	good := Camera{X: 0, Y: 0, Height: 4}
	tests := []struct {
		name string
		call func() error
		want string
	}{
		{"camera at the water", func() error { _, err := Refract(Camera{Height: 0}, Point{1, 1}, 1, WaterIndex); return err }, "camera height 0 m"},
		{"index below 1", func() error { _, err := Refract(good, Point{1, 1}, 1, 0.9); return err }, "refractive index 0.9"},
		{"negative depth", func() error { _, err := Refract(good, Point{1, 1}, -1, WaterIndex); return err }, "depth -1 m"},
		{"negative profile", func() error {
			_, _, err := RefractToFloor(good, Point{1, 1}, FixedDepth(-0.5), WaterIndex)
			return err
		}, "must not be negative"},
		{"slope with no length", func() error {
			_, _, err := RefractToFloor(good, Point{1, 1}, LinearFloor(1, 2, 3, 3), WaterIndex)
			return err
		}, "both at x = 3 m"},
		{"coping above camera", func() error { _, err := CopingToSurface(good, Point{1, 1}, 5); return err }, "coping height 5 m"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			err := tt.call()
			require.Error(t, err)
			assert.Contains(t, err.Error(), tt.want)
		})
	}
}

func TestCoping(t *testing.T) {
	// Hand-worked similar triangles: camera 4.12 m above the water, a point
	// 2 m from its foot on the 0.12 m coping plane is on a sight line that
	// reaches the water at 2·4.12/4 = 2.06 m.
	cam := Camera{X: 0, Y: 0, Height: 4.12}
	s, err := CopingToSurface(cam, Point{2, 0}, DefaultCopingHeight)
	require.NoError(t, err)
	assert.InDelta(t, 2.06, s.X, 1e-12)
	assert.InDelta(t, 0, s.Y, 1e-12)

	cam = Camera{X: -2, Y: 2, Height: 5}
	p := Point{7, 4}
	s, err = CopingToSurface(cam, p, DefaultCopingHeight)
	require.NoError(t, err)
	back, err := SurfaceToCoping(cam, s, DefaultCopingHeight)
	require.NoError(t, err)
	assert.InDelta(t, p.X, back.X, 1e-12)
	assert.InDelta(t, p.Y, back.Y, 1e-12)
	assert.Greater(t, s.Dist(Point{cam.X, cam.Y}), p.Dist(Point{cam.X, cam.Y}))
}
