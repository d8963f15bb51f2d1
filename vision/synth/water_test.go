package synth

import (
	"context"
	"math"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestApparentSnell checks the renderer's refraction against a hand-worked
// case of Snell's law (n₁ sin θ₁ = n₂ sin θ₂, water index 1.333 from the
// CRC Handbook): a sight line 45° from vertical enters the water 5 m from
// the foot of a 5 m high camera; in water sin θw = sin 45°/1.333 = 0.53047,
// tan θw = 0.62582, so a point 1 m deep seen there lies 5.62582 m out. The
// shift against an unbent line is 1·(tan 45° − 0.62582) = 0.374 m, the
// 0.37·D of the usual table.
func TestApparentSnell(t *testing.T) {
	cam := [3]float64{1, 2, 5}
	// Along the direction (0.6, 0.8) from the camera foot.
	R := 5.62582
	sx, sy, err := apparent(cam, 1+0.6*R, 2+0.8*R, 1, WaterIndex)
	require.NoError(t, err)
	assert.InDelta(t, 1+0.6*5, sx, 2e-4)
	assert.InDelta(t, 2+0.8*5, sy, 2e-4)
	// An unbent line through that surface point would reach 1 m depth at
	// 5 + tan 45° = 6 m: 0.374 m beyond the refracted one.
	straight := math.Hypot(sx-1, sy-2) + 1
	assert.InDelta(t, 0.374, straight-R, 1e-3)
	// At 30°: surface point at 5·tan 30° = 2.88675 m; sin θw = 0.5/1.333
	// = 0.37509, tan θw = 0.40463, so a point 2 m deep lies 0.80927 m on.
	sx, _, err = apparent(cam, 1+2.88675+0.80927, 2, 2, WaterIndex)
	require.NoError(t, err)
	assert.InDelta(t, 1+2.88675, sx, 2e-4)

	// Straight below the camera nothing moves; at the surface nothing moves.
	sx, sy, err = apparent(cam, 1, 2, 1.5, WaterIndex)
	require.NoError(t, err)
	assert.Equal(t, [2]float64{1, 2}, [2]float64{sx, sy})
	sx, sy, err = apparent(cam, 4, 3, 0, WaterIndex)
	require.NoError(t, err)
	assert.Equal(t, [2]float64{4, 3}, [2]float64{sx, sy})
}

// TestRenderSubmergedLabels renders a child on the floor and checks that
// the labels carry both the apparent (drawn) and the true position, and
// that the drawn one is displaced towards the camera.
func TestRenderSubmergedLabels(t *testing.T) {
	dir := t.TempDir()
	s := Default()
	s.Duration = 1
	s.Ripple, s.Glints, s.Noise = 0, 0, 0
	s.Intruders = []Child{{Path: []Waypoint{{T: 0, X: 5, Y: 2}}, AgeMonths: 24, Lying: true, Contrast: 0.6, Depth: 1.2}}
	truth, err := Render(context.Background(), s, filepath.Join(dir, "c.avi"), filepath.Join(dir, "c.json"))
	require.NoError(t, err)
	back, err := ReadTruth(filepath.Join(dir, "c.json"))
	require.NoError(t, err)
	for _, tr := range []Truth{truth, back} {
		occ := tr.PerFrame[3].Intruder
		require.NotNil(t, occ)
		require.NotNil(t, occ.Under)
		assert.Equal(t, 1.2, occ.Under.Depth)
		// The camera is at x = -2: the apparent point is nearer to it.
		assert.Less(t, occ.X, occ.Under.X-0.3, "apparent x %.3f vs floor x %.3f", occ.X, occ.Under.X)
		ax, ay, err := s.Apparent(occ.Under.X, occ.Under.Y, 1.2)
		require.NoError(t, err)
		assert.InDelta(t, ax, occ.X, 0.02)
		assert.InDelta(t, ay, occ.Y, 0.02)
	}
}
