package vision

import (
	"image"
	"image/color"
	"math"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/vision/synth"
)

func rgb(img image.Image, x, y int) [3]uint32 {
	r, g, b, _ := img.At(x, y).RGBA()
	return [3]uint32{r >> 8, g >> 8, b >> 8}
}

func TestGrabFrame(t *testing.T) {
	img := readImage(t, "graf1.png")
	assert.Equal(t, image.Pt(800, 640), img.Bounds().Size(), "graf1.png is 800×640")

	dir := t.TempDir()
	s := synth.Default()
	s.Duration = 0.3
	clip, _ := cachedClip(t, s)
	f, err := GrabFrame(clip, "", 0)
	require.NoError(t, err)
	assert.Equal(t, image.Pt(640, 480), f.Bounds().Size())

	_, err = GrabFrame(filepath.Join(dir, "missing.png"), "", 0)
	assert.ErrorContains(t, err, "cannot read the image")
	_, err = GrabFrame(filepath.Join(dir, "missing.avi"), "", 0)
	assert.Error(t, err)
}

// TestWarpPerspectiveShift: a whole-pixel translation moves every pixel
// exactly (bilinear weights are 0 and 1).
func TestWarpPerspectiveShift(t *testing.T) {
	img := readImage(t, "graf1.png")
	out, err := WarpPerspective(img, [9]float64{1, 0, 10, 0, 1, 5, 0, 0, 1}, image.Pt(400, 300))
	require.NoError(t, err)
	assert.Equal(t, image.Pt(400, 300), out.Bounds().Size())
	for _, p := range []image.Point{{0, 0}, {100, 37}, {389, 294}, {250, 120}} {
		assert.Equal(t, rgb(img, p.X, p.Y), rgb(out, p.X+10, p.Y+5), "pixel %v", p)
	}
	// Outside the source is black.
	assert.Equal(t, [3]uint32{0, 0, 0}, rgb(out, 3, 2))
	_, err = WarpPerspective(img, [9]float64{1, 0, 0, 0, 1, 0, 0, 0, 1}, image.Pt(0, 10))
	assert.Error(t, err)
}

// TestUndistortImage: zero coefficients leave the image as it was; a
// barrel coefficient pulls an off-centre feature outwards.
func TestUndistortImage(t *testing.T) {
	img := readImage(t, "graf1.png")
	k := [9]float64{600, 0, 400, 0, 600, 320, 0, 0, 1}
	same, err := UndistortImage(img, k, []float64{0, 0, 0, 0, 0}, false)
	require.NoError(t, err)
	var diff float64
	n := 0
	for y := 10; y < 630; y += 7 {
		for x := 10; x < 790; x += 7 {
			a, b := rgb(img, x, y), rgb(same, x, y)
			for c := 0; c < 3; c++ {
				diff += math.Abs(float64(a[c]) - float64(b[c]))
				n++
			}
		}
	}
	assert.Less(t, diff/float64(n), 1.0, "mean grey-level change with zero distortion")

	// A white dot at 200 px right of the principal point, on black.
	dot := image.NewRGBA(image.Rect(0, 0, 800, 640))
	for y := 318; y <= 322; y++ {
		for x := 598; x <= 602; x++ {
			dot.Set(x, y, color.White)
		}
	}
	// k1 = -0.2: the lens drew the dot at r_d = r(1 - 0.2 r²) with
	// r = x/f, so the ideal dot lies farther out than 600 px.
	und, err := UndistortImage(dot, k, []float64{-0.2, 0, 0, 0, 0}, false)
	require.NoError(t, err)
	var sx, sw float64
	for x := 560; x < 700; x++ {
		v := float64(rgb(und, x, 320)[0])
		sx += v * float64(x)
		sw += v
	}
	require.Greater(t, sw, 0.0)
	// Forward model: ideal r with r(1 - 0.2 r²) = 200/600 gives r = 0.34151, x = 604.9 px.
	assert.InDelta(t, 604.9, sx/sw, 0.5, "centre of the undistorted dot")

	fish, err := UndistortImage(img, k, []float64{0, 0, 0, 0}, true)
	require.NoError(t, err)
	assert.Equal(t, img.Bounds().Size(), fish.Bounds().Size())
}

func TestDrawOverlay(t *testing.T) {
	img := image.NewRGBA(image.Rect(0, 0, 100, 80))
	red := color.RGBA{230, 40, 40, 255}
	out, err := DrawOverlay(img, []Stroke{{Points: []Point{{10, 40}, {90, 40}}, Color: red, Width: 3}},
		[]Label{{At: Point{5, 20}, Text: "A", Color: color.RGBA{255, 220, 0, 255}}})
	require.NoError(t, err)
	assert.Equal(t, [3]uint32{230, 40, 40}, rgb(out, 50, 40), "RGB colours survive the BGR Mat")
	assert.Equal(t, [3]uint32{0, 0, 0}, rgb(out, 50, 60))
	lit := 0
	for y := 5; y < 22; y++ {
		for x := 5; x < 20; x++ {
			if rgb(out, x, y)[0] > 200 {
				lit++
			}
		}
	}
	assert.Greater(t, lit, 5, "label drawn")
}
