package homography

import (
	"image"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// squareOn is an 8 m × 4 m pool seen square-on at 50 px/m: corner A at
// pixel (100, 300), x to the right, pool y up the image, so pool (x, y) m
// is pixel (100 + 50x, 300 − 50y).
func squareOn() CalibrationSpec {
	return CalibrationSpec{
		Length: 8, Width: 4, Frame: image.Pt(640, 480),
		Corners: []Point{{100, 300}, {500, 300}, {500, 100}, {100, 100}},
	}
}

// TestCalibrationSquareOn checks the mapping on hand-worked points of the
// square-on pool, and the round trip pixel → pool → pixel.
func TestCalibrationSquareOn(t *testing.T) {
	c, err := NewCalibration(squareOn())
	require.NoError(t, err)
	tests := []struct {
		name   string
		px     Point // recorded pixels
		pool   Point // pool metres on the surface
		inside bool
	}{
		{"near corner A", Point{110, 290}, Point{0.2, 0.2}, true},
		{"centre", Point{300, 200}, Point{4, 2}, true},
		{"near corner C", Point{490, 110}, Point{7.8, 3.8}, true},
		{"on the deck beyond B", Point{550, 300}, Point{9, 0}, false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, ok := c.Surface(tt.px)
			require.True(t, ok)
			assert.InDelta(t, tt.pool.X, got.X, 1e-9)
			assert.InDelta(t, tt.pool.Y, got.Y, 1e-9)
			assert.Equal(t, tt.inside, c.Inside(got))
			back, ok := c.Pixel(got)
			require.True(t, ok)
			assert.InDelta(t, tt.px.X, back.X, 1e-6)
			assert.InDelta(t, tt.px.Y, back.Y, 1e-6)
			// 50 px/m everywhere: a pixel is 2 cm, 4 cm².
			assert.InDelta(t, 0.02, c.MetresPerPixel(tt.px), 1e-9)
			assert.InDelta(t, 0.0004, c.PixelArea(tt.px), 1e-12)
		})
	}
	// A 50 px square is 1 m².
	assert.InDelta(t, 1.0, c.Area([]Point{{200, 200}, {250, 200}, {250, 150}, {200, 150}}), 1e-9)
	mask := c.Mask()
	require.Len(t, mask, 4, "without a lens the rectangle's corners alone")
	for i, want := range []Point{{100, 300}, {500, 300}, {500, 100}, {100, 100}} {
		assert.InDelta(t, want.X, mask[i].X, 1e-6)
		assert.InDelta(t, want.Y, mask[i].Y, 1e-6)
	}
	fit := c.Fit()
	assert.Equal(t, 4, fit.Points)
	assert.InDelta(t, 0, fit.RMSM, 1e-9, "four corners fit exactly")
	assert.NoError(t, c.CheckFrame(image.Pt(640, 480)))
	assert.ErrorContains(t, c.CheckFrame(image.Pt(1280, 720)), "frame_px")
	// No depth model: the floor position is the surface point, depth 0.
	f, d := c.Floor(Point{4, 2})
	assert.Equal(t, Point{4, 2}, f)
	assert.Zero(t, d)
}

// TestCalibrationFloor checks refraction to a 1 m floor against Snell's
// law worked by hand: a camera 4 m above pool (2, 2) sees the surface
// point (4, 2) at atan(2/4) from the vertical; in water (n = 1.333, CRC
// Handbook) the ray bends to asin(sin θ / 1.333) and meets the floor that
// much further along x. Straight below the camera it does not bend.
func TestCalibrationFloor(t *testing.T) {
	s := squareOn()
	s.Camera = &Camera{X: 2, Y: 2, Height: 4}
	depth := FixedDepth(1)
	s.Depth = &depth
	c, err := NewCalibration(s)
	require.NoError(t, err)
	theta := math.Asin(math.Sin(math.Atan(2.0/4.0)) / 1.333)
	tests := []struct {
		name    string
		surface Point
		want    Point
	}{
		{"oblique", Point{4, 2}, Point{4 + math.Tan(theta), 2}},
		{"below the camera", Point{2, 2}, Point{2, 2}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			f, d := c.Floor(tt.surface)
			assert.InDelta(t, tt.want.X, f.X, 1e-6)
			assert.InDelta(t, tt.want.Y, f.Y, 1e-6)
			assert.InDelta(t, 1.0, d, 1e-9)
		})
	}
	_, refracts := c.Depth()
	assert.True(t, refracts)
}

// TestCalibrationDriftShift checks the corner shift under a registration
// that moves the picture 10 px right: 0.2 m at 50 px/m. Without a move it
// is 0.
func TestCalibrationDriftShift(t *testing.T) {
	c, err := NewCalibration(squareOn())
	require.NoError(t, err)
	tests := []struct {
		name string
		move func(Point) (Point, bool)
		want float64
		ok   bool
	}{
		{"still", func(p Point) (Point, bool) { return p, true }, 0, true},
		{"10 px right", func(p Point) (Point, bool) { return Point{p.X + 10, p.Y}, true }, 0.2, true},
		{"off the plane", func(p Point) (Point, bool) { return Point{}, false }, math.Inf(1), false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, ok := c.DriftShift(tt.move)
			assert.Equal(t, tt.ok, ok)
			if math.IsInf(tt.want, 1) {
				assert.True(t, math.IsInf(got, 1))
				return
			}
			assert.InDelta(t, tt.want, got, 1e-9)
		})
	}
}

// TestCalibrationErrors checks that a spec that cannot be solved says
// which setting is wrong.
func TestCalibrationErrors(t *testing.T) {
	collinear := squareOn()
	collinear.Corners = []Point{{100, 300}, {200, 300}, {300, 300}, {400, 300}}
	coping := squareOn()
	coping.Coping = 0.1
	depth := FixedDepth(1)
	deep := squareOn()
	deep.Depth = &depth
	tests := []struct {
		name string
		spec CalibrationSpec
		want string
	}{
		{"corners on a line", collinear, "corners"},
		{"coping without a camera", coping, "corners_on coping"},
		{"depth without a camera", deep, "water: refraction needs the camera position"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, err := NewCalibration(tt.spec)
			assert.ErrorContains(t, err, tt.want)
		})
	}
}
