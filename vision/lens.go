package vision

import (
	"errors"
	"fmt"
	"image"
	"image/color"
	"math"
	"path/filepath"
	"strings"
	"time"

	"gocv.io/x/gocv"
)

// stillImage reports whether path names an image file rather than a clip.
func stillImage(path string) bool {
	switch strings.ToLower(filepath.Ext(path)) {
	case ".png", ".jpg", ".jpeg", ".bmp", ".tif", ".tiff", ".webp":
		return true
	}
	return false
}

// GrabFrame returns one full-resolution frame of a source: an image file,
// the first frame of a clip, or the next frame of a camera URL (rtsp://,
// http://). transport is "tcp", "udp" or empty, as for SourceConfig;
// timeout bounds opening and reading (zero keeps OpenCV's 30 s).
func GrabFrame(uri, transport string, timeout time.Duration) (image.Image, error) {
	red := Redact(uri)
	if !strings.Contains(uri, "://") && stillImage(uri) {
		m := gocv.IMRead(uri, gocv.IMReadColor)
		defer m.Close()
		if m.Empty() {
			return nil, fmt.Errorf("grab frame %q: cannot read the image (missing, or not an image OpenCV decodes)", red)
		}
		return matImage(m)
	}
	// Deblocked: this frame is for a person to click corners on.
	cam, err := OpenCamera(SourceConfig{URI: uri, Transport: transport, OpenTimeout: timeout, ReadTimeout: timeout, Deblock: true}, DetectorConfig{})
	if err != nil {
		return nil, fmt.Errorf("grab frame: %w", err)
	}
	defer cam.Close()
	// A live stream's first frames may be a decoder's grey (see rejoin.go):
	// take the first frame the detector would trust. The probing ends by
	// RejoinLimit at the latest.
	for cam.rejoin != nil {
		if _, err := cam.Next(nil); err != nil {
			return nil, fmt.Errorf("grab frame %q: %w", red, err)
		}
	}
	frame, err := cam.bgr()
	if err != nil {
		return nil, fmt.Errorf("grab frame %q: %w", red, err)
	}
	img, err := matImage(frame)
	if err != nil {
		return nil, fmt.Errorf("grab frame %q: %w", red, err)
	}
	return img, nil
}

// matImage converts a BGR or grey 8-bit Mat to an image.Image.
func matImage(m gocv.Mat) (image.Image, error) {
	img, err := m.ToImage()
	if err != nil {
		return nil, fmt.Errorf("convert frame: %w", err)
	}
	return img, nil
}

// imageMat converts an image to a BGR 8-bit Mat. The caller closes it.
func imageMat(img image.Image) (gocv.Mat, error) {
	if img == nil || img.Bounds().Empty() {
		return gocv.NewMat(), errors.New("empty image")
	}
	// ImageToMatRGB reads *image.RGBA's buffer directly only when it
	// starts at the origin with a tight stride; copy anything else.
	if r, ok := img.(*image.RGBA); !ok || r.Rect.Min != (image.Point{}) || r.Stride != 4*r.Rect.Dx() {
		b := img.Bounds()
		cp := image.NewRGBA(image.Rect(0, 0, b.Dx(), b.Dy()))
		for y := 0; y < b.Dy(); y++ {
			for x := 0; x < b.Dx(); x++ {
				cp.Set(x, y, img.At(b.Min.X+x, b.Min.Y+y))
			}
		}
		img = cp
	}
	m, err := gocv.ImageToMatRGB(img)
	if err != nil {
		m.Close()
		return gocv.NewMat(), fmt.Errorf("convert image: %w", err)
	}
	return m, nil
}

func matrix3(h [9]float64) gocv.Mat {
	m := gocv.NewMatWithSize(3, 3, gocv.MatTypeCV64F)
	for i, v := range h {
		m.SetDoubleAt(i/3, i%3, v)
	}
	return m
}

// WarpPerspective maps img through the 3×3 row-major transform h (source
// pixels to output pixels, origin top-left, y down) into an image of the
// given size, with bilinear interpolation and black outside the source.
func WarpPerspective(img image.Image, h [9]float64, size image.Point) (image.Image, error) {
	if size.X <= 0 || size.Y <= 0 {
		return nil, fmt.Errorf("warp perspective: output size %v is not positive", size)
	}
	src, err := imageMat(img)
	defer src.Close()
	if err != nil {
		return nil, fmt.Errorf("warp perspective: %w", err)
	}
	m := matrix3(h)
	defer m.Close()
	dst := gocv.NewMat()
	defer dst.Close()
	gocv.WarpPerspectiveWithParams(src, &dst, m, size, gocv.InterpolationLinear, gocv.BorderConstant, color.RGBA{})
	return matImage(dst)
}

// UndistortImage removes lens distortion from img: k is the 3×3 camera
// matrix (row-major, pixels), dist the coefficients in OpenCV's order
// (pinhole k1 k2 p1 p2 [k3], or fisheye k1…k4 when fisheye is set). The
// output has the same size and camera matrix.
func UndistortImage(img image.Image, k [9]float64, dist []float64, fisheye bool) (image.Image, error) {
	src, err := imageMat(img)
	defer src.Close()
	if err != nil {
		return nil, fmt.Errorf("undistort image: %w", err)
	}
	km := matrix3(k)
	defer km.Close()
	d := gocv.NewMatWithSize(1, len(dist), gocv.MatTypeCV64F)
	defer d.Close()
	for i, v := range dist {
		d.SetDoubleAt(0, i, v)
	}
	dst := gocv.NewMat()
	defer dst.Close()
	if fisheye {
		gocv.FisheyeUndistortImageWithParams(src, &dst, km, d, km, image.Pt(src.Cols(), src.Rows()))
	} else {
		gocv.Undistort(src, &dst, km, d, km)
	}
	return matImage(dst)
}

// Stroke is a polyline to draw on a frame, in pixels.
type Stroke struct {
	Points []Point
	Closed bool
	Color  color.RGBA
	Width  int
}

// Label is text to draw with its lower-left corner at At, in pixels.
type Label struct {
	At    Point
	Text  string
	Color color.RGBA
}

// DrawOverlay returns a copy of img with the strokes and labels drawn on
// it. Colours are RGB.
func DrawOverlay(img image.Image, strokes []Stroke, labels []Label) (image.Image, error) {
	m, err := imageMat(img)
	defer m.Close()
	if err != nil {
		return nil, fmt.Errorf("draw overlay: %w", err)
	}
	for _, s := range strokes {
		w := max(s.Width, 1)
		n := len(s.Points)
		for i := 0; i+1 < n || (s.Closed && i < n && n > 2); i++ {
			a, b := s.Points[i], s.Points[(i+1)%n]
			gocv.Line(&m, roundPt(a), roundPt(b), s.Color, w)
		}
	}
	for _, l := range labels {
		// A dark halo keeps the text readable on water and sky.
		gocv.PutTextWithParams(&m, l.Text, roundPt(l.At), gocv.FontHersheySimplex, 0.5, color.RGBA{0, 0, 0, 0}, 3, gocv.LineAA, false)
		gocv.PutTextWithParams(&m, l.Text, roundPt(l.At), gocv.FontHersheySimplex, 0.5, l.Color, 1, gocv.LineAA, false)
	}
	return matImage(m)
}

func roundPt(p Point) image.Point {
	return image.Pt(int(math.Round(p.X)), int(math.Round(p.Y)))
}
