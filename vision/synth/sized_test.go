package synth

import (
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestSizedKeepsTheView: a scene made another size sees every point of
// the pool at the same place, scaled per axis with the image, so a
// camera's main and sub streams share one calibration up to that scale.
func TestSizedKeepsTheView(t *testing.T) {
	base := FamilyScene(34, Intruder)
	for _, sz := range [][2]int{{1920, 1080}, {640, 360}, {704, 576}} {
		s, err := Sized(base, sz[0], sz[1], 15, 40, "h264")
		require.NoError(t, err)
		assert.Equal(t, 15.0, s.FPS)
		assert.Equal(t, 15, s.World.Encoding.GOP)
		sx, sy := float64(sz[0])/float64(base.Width), float64(sz[1])/float64(base.Height)
		a, b := newLensCam(base.Camera, base.World.Lens), newLensCam(s.Camera, s.World.Lens)
		for _, p := range [][2]float64{{0, 0}, {base.PoolLength, 0}, {base.PoolLength / 2, base.PoolWidth / 2}, {0, base.PoolWidth}} {
			u0, v0, ok0 := a.project(p[0], p[1], 0)
			u1, v1, ok1 := b.project(p[0], p[1], 0)
			require.True(t, ok0 && ok1)
			assert.InDelta(t, u0*sx, u1, 1e-6, "point %v", p)
			assert.InDelta(t, v0*sy, v1, 1e-6, "point %v", p)
		}
	}
	assert.Equal(t, 1280, base.Width, "the base scene is unchanged")
	_, err := Sized(base, 640, 360, 15, 40, "vp9")
	assert.ErrorContains(t, err, "codec")
	_, err = Sized(Default(), 640, 360, 15, 40, "h264")
	assert.ErrorContains(t, err, "not a family scene")
}
