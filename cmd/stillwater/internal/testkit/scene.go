package testkit

import (
	"math"
	"testing"

	"github.com/stretchr/testify/require"

	"stillwater/homography"
	"stillwater/vision"
	"stillwater/vision/synth"
)

// Click projects pool point (x, y, z) through the generator's camera and
// rounds to a whole pixel, as an installer's click or a detector's
// centroid would be.
func Click(t *testing.T, s synth.Scene, x, y, z float64) vision.Point {
	t.Helper()
	u, v, ok := s.Project(x, y, z)
	require.True(t, ok, "(%g, %g, %g) behind the camera", x, y, z)
	return vision.Point{X: math.Round(u), Y: math.Round(v)}
}

// Surface maps a recorded pixel to pool metres on the water surface.
func Surface(c *homography.Calibration, p vision.Point) (homography.Point, bool) {
	return c.Surface(homography.Point(p))
}

// CameraOf returns the calibration's camera centre, pool metres.
func CameraOf(c *homography.Calibration) homography.Camera {
	cam, _, _ := c.Camera()
	return cam
}
