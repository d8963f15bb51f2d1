package synth

import (
	"context"
	"math"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"
)

func TestRenderWritesClipAndLabels(t *testing.T) {
	dir := t.TempDir()
	s := Default()
	s.Duration = 3
	s.Intruders = []Child{{Enter: 1, Path: []Waypoint{{T: 1, X: 4, Y: 2}, {T: 3, X: 5, Y: 2}}, AgeMonths: 24}}
	video := filepath.Join(dir, "c.avi")
	truth, err := Render(context.Background(), s, video, filepath.Join(dir, "c.json"))
	require.NoError(t, err)
	assert.Equal(t, 30, len(truth.PerFrame))
	require.Len(t, truth.Presence, 1)
	assert.InDelta(t, 1.0, truth.Presence[0].From, 1e-9)
	assert.Nil(t, truth.PerFrame[5].Intruder)
	require.NotNil(t, truth.PerFrame[15].Intruder)

	// Upright 24-month-old: the union of a shoulder ellipse with semi-axes
	// 0.1175 × 0.05875 m (breadth 0.235 m, from memory) and a head disc of
	// diameter 0.483/π m (WHO median head circumference 48.3 cm). The union
	// is at least the larger part and at most their sum, and lies in the
	// 0.02–0.06 m² head-and-shoulders range derived from the WHO table.
	a := truth.PerFrame[15].Intruder.Area
	ellipse := math.Pi * 0.1175 * 0.05875
	head := math.Pi * math.Pow(0.483/math.Pi/2, 2)
	assert.GreaterOrEqual(t, a, math.Max(ellipse, head)*0.95)
	assert.LessOrEqual(t, a, (ellipse+head)*1.05)
	assert.True(t, a >= 0.02 && a <= 0.06, "area %g m²", a)

	vc, err := gocv.VideoCaptureFile(video)
	require.NoError(t, err)
	defer vc.Close()
	m := gocv.NewMat()
	defer m.Close()
	n := 0
	for vc.Read(&m) {
		assert.Equal(t, 640, m.Cols())
		n++
	}
	assert.Equal(t, 30, n)

	back, err := ReadTruth(filepath.Join(dir, "c.json"))
	require.NoError(t, err)
	assert.Equal(t, truth.Corners, back.Corners)
}
