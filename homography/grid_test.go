package homography_test

import (
	"image"
	"image/color"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"

	"stillwater/homography"
	"stillwater/vision/refdata"
)

func TestNewGridHandWorked(t *testing.T) {
	// 100 px per metre, pool origin at pixel (10, 20); 0.25 m cells over
	// 1 × 0.5 m give 4 × 2 cells whose centres are 0.125 m in.
	toPx := func(p homography.Point) (homography.Point, bool) {
		return homography.Point{X: 100*p.X + 10, Y: 100*p.Y + 20}, true
	}
	g, err := homography.NewGrid(homography.Point{}, homography.Point{X: 1, Y: 0.5}, 0.25, 100, 200, toPx)
	require.NoError(t, err)
	assert.Equal(t, 4, g.CellsX)
	assert.Equal(t, 2, g.CellsY)
	assert.Equal(t, []float32{22.5, 47.5, 72.5, 97.5, 22.5, 47.5, 72.5, 97.5}, g.MapX)
	assert.InDelta(t, 32.5, g.MapY[0], 1e-6)
	assert.InDelta(t, 57.5, g.MapY[4], 1e-6)
	// x = 97.5 px is inside a 100 px frame; a 90 px frame loses that column.
	g2, err := homography.NewGrid(homography.Point{}, homography.Point{X: 1, Y: 0.5}, 0.25, 90, 200, toPx)
	require.NoError(t, err)
	assert.Equal(t, float32(-1), g2.MapX[3])
	assert.Equal(t, float32(-1), g2.MapY[7])
	assert.InDelta(t, 0.75, g2.Seen(), 1e-9)
	// Cell units and pool metres round trip.
	p := g.ToPlane(1.5, 0.5)
	assert.InDelta(t, 0.375, p.X, 1e-12)
	assert.InDelta(t, 0.125, p.Y, 1e-12)
	x, y := g.ToCells(p)
	assert.InDelta(t, 1.5, x, 1e-12)
	assert.InDelta(t, 0.5, y, 1e-12)
	assert.Equal(t, g.Centre(1, 0), g.ToPlane(1.5, 0.5))

	_, err = homography.NewGrid(homography.Point{}, homography.Point{X: 1, Y: 1}, 0, 100, 100, toPx)
	assert.Error(t, err)
	_, err = homography.NewGrid(homography.Point{}, homography.Point{X: 100, Y: 100}, 0.01, 100, 100, toPx)
	assert.ErrorIs(t, err, homography.ErrGridTooLarge)
}

// TestGridMatchesOpenCVRectification checks one remap through a grid
// (lens distortion and homography in one pure-Go map) against OpenCV's two
// steps, undistort with the chessboard calibration and then
// warpPerspective, on Debian opencv-doc's left01.jpg with its published
// intrinsics (left_intrinsics.yml). Remap interpolates once where OpenCV's
// path interpolates twice, so the sharp board edges differ by a few grey
// levels; the mean over the picture must stay small.
func TestGridMatchesOpenCVRectification(t *testing.T) {
	lens := leftLens(t)
	path, err := refdata.Path("left01.jpg")
	require.NoError(t, err)
	img := gocv.IMRead(path, gocv.IMReadGrayScale)
	require.False(t, img.Empty())
	defer img.Close()

	// A plane seen in perspective: undistorted pixels to "metres".
	src := []homography.Point{{X: 100, Y: 80}, {X: 540, Y: 60}, {X: 600, Y: 420}, {X: 60, Y: 440}}
	dst := []homography.Point{{X: 0, Y: 0}, {X: 4, Y: 0}, {X: 4, Y: 3}, {X: 0, Y: 3}}
	toPlane, err := homography.Solve(src, dst)
	require.NoError(t, err)
	toPx, err := toPlane.Inverse()
	require.NoError(t, err)
	const cell = 0.01
	g, err := homography.NewGrid(homography.Point{}, homography.Point{X: 4, Y: 3}, cell, img.Cols(), img.Rows(), func(p homography.Point) (homography.Point, bool) {
		u, ok := toPx.Map(p)
		if !ok {
			return homography.Point{}, false
		}
		return lens.Distort(u), true
	})
	require.NoError(t, err)
	size := image.Pt(g.CellsX, g.CellsY)

	mx, err := gocv.NewMatFromBytes(g.CellsY, g.CellsX, gocv.MatTypeCV32F, float32Bytes(g.MapX))
	require.NoError(t, err)
	defer mx.Close()
	my, err := gocv.NewMatFromBytes(g.CellsY, g.CellsX, gocv.MatTypeCV32F, float32Bytes(g.MapY))
	require.NoError(t, err)
	defer my.Close()
	ours := gocv.NewMat()
	defer ours.Close()
	gocv.Remap(img, &ours, &mx, &my, gocv.InterpolationLinear, gocv.BorderConstant, color.RGBA{})

	k := kMat(lens.K)
	defer k.Close()
	d := rowMat(lens.Dist)
	defer d.Close()
	und := gocv.NewMat()
	defer und.Close()
	gocv.Undistort(img, &und, k, d, k)
	// Cell centres: cell (i, j) is metres ((i+0.5)·cell, (j+0.5)·cell).
	s := homography.H{1 / cell, 0, -0.5, 0, 1 / cell, -0.5, 0, 0, 1}.Mul(toPlane)
	hm := gocv.NewMatWithSize(3, 3, gocv.MatTypeCV64F)
	defer hm.Close()
	for i, v := range s {
		hm.SetDoubleAt(i/3, i%3, v)
	}
	theirs := gocv.NewMat()
	defer theirs.Close()
	gocv.WarpPerspective(und, &theirs, hm, size)

	var sum float64
	var n int
	for y := 5; y < size.Y-5; y++ {
		for x := 5; x < size.X-5; x++ {
			a, b := float64(ours.GetUCharAt(y, x)), float64(theirs.GetUCharAt(y, x))
			if a == 0 || b == 0 {
				continue // outside the frame in one of them
			}
			sum += math.Abs(a - b)
			n++
		}
	}
	require.Greater(t, n, size.X*size.Y/2)
	mean := sum / float64(n)
	t.Logf("mean |remap − undistort+warpPerspective| = %.2f grey levels over %d cells", mean, n)
	assert.Less(t, mean, 3.0)
}

func float32Bytes(v []float32) []byte {
	b := make([]byte, 4*len(v))
	for i, f := range v {
		u := math.Float32bits(f)
		b[4*i], b[4*i+1], b[4*i+2], b[4*i+3] = byte(u), byte(u>>8), byte(u>>16), byte(u>>24)
	}
	return b
}
