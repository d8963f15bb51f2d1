package console

import (
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/homography"
)

// solvedFrom solves the plane of a pool of length × width metres seen at
// the four corners.
func solvedFrom(t *testing.T, corners [][2]float64, length, width float64) planeSolved {
	t.Helper()
	px := make([]homography.Point, 4)
	for i, c := range corners {
		px[i] = homography.Point{X: c[0], Y: c[1]}
	}
	h, err := homography.Solve(px, []homography.Point{{}, {X: length}, {X: length, Y: width}, {Y: width}})
	require.NoError(t, err)
	inv, err := h.Inverse()
	require.NoError(t, err)
	return planeSolved{toPool: h, toPx: inv, length: length, width: width, corners: px}
}

// behindHalf refuses every pool point beyond x = cut, as a camera would
// for points behind it.
type behindHalf struct {
	planeSolved
	cut float64
}

func (b behindHalf) Pixel(s homography.Point) (homography.Point, bool) {
	if s.X > b.cut {
		return homography.Point{}, false
	}
	return b.planeSolved.Pixel(s)
}

func TestPreviewOf(t *testing.T) {
	square := [][2]float64{{100, 100}, {500, 100}, {500, 300}, {100, 300}} // 40 px a metre
	tests := []struct {
		name           string
		s              Solved
		lines          int
		near, far      float64
		nearAt, farAt  string
		axisX, axisY   [2]float64
		firstLinePts   int
		lastLineEndsAt [2]float64
	}{
		// Hand-worked: 10 m × 5 m at 40 px a metre from (100, 100).
		{"square above the pool", solvedFrom(t, square, 10, 5), 11 + 6, 0.025, 0.025, "A", "A", [2]float64{140, 100}, [2]float64{100, 140}, 21, [2]float64{500, 300}},
		// 12.5 m × 6 m: whole metres and the far side at 12.5 m.
		{"size not whole", solvedFrom(t, [][2]float64{{100, 100}, {600, 100}, {600, 340}, {100, 340}}, 12.5, 6), 14 + 7, 0.025, 0.025, "A", "A", [2]float64{140, 100}, [2]float64{100, 140}, 25, [2]float64{600, 340}},
		// The fake camera's pool: the near side (A, B) is wider.
		{"perspective", solvedFrom(t, fakeCorners, 10, 5), 17, math.NaN(), math.NaN(), "A", "C", [2]float64{}, [2]float64{}, 21, [2]float64{450, 90}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			p := PreviewOf(tc.s, [2]int{640, 360})
			assert.Len(t, p.Grid, tc.lines)
			assert.Len(t, p.Grid[0], tc.firstLinePts, "a point every 0.25 m")
			last := p.Grid[len(p.Grid)-1]
			assert.InDelta(t, tc.lastLineEndsAt[0], last[len(last)-1][0], 0.01)
			assert.InDelta(t, tc.lastLineEndsAt[1], last[len(last)-1][1], 0.01)
			if !math.IsNaN(tc.near) {
				assert.InDelta(t, tc.near, p.NearMPP, 1e-9)
				assert.InDelta(t, tc.far, p.FarMPP, 1e-9)
				assert.Equal(t, tc.axisX, p.AxisX[len(p.AxisX)-1])
				assert.Equal(t, tc.axisY, p.AxisY[len(p.AxisY)-1])
			} else {
				assert.Less(t, p.NearMPP, p.FarMPP)
			}
			assert.Contains(t, []string{"A", "B"}, p.NearCorner)
			assert.Contains(t, []string{"A", tc.farAt, "D"}, p.FarCorner)
		})
	}
}

func TestPreviewOfDropsUnseenPoints(t *testing.T) {
	s := behindHalf{planeSolved: solvedFrom(t, [][2]float64{{100, 100}, {500, 100}, {500, 300}, {100, 300}}, 10, 5), cut: 4}
	p := PreviewOf(s, [2]int{640, 360})
	// Lines at x = 0…4 are whole; x = 5…10 are unseen; the 6 lines along
	// x keep their first 4 m (17 points).
	assert.Len(t, p.Grid, 5+6)
	assert.Len(t, p.Grid[5], 17)
	assert.Equal(t, "A", p.NearCorner)
	assert.Equal(t, "A", p.FarCorner, "B and C are unseen; D is as near as A")
}
