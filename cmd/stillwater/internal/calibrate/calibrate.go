// Package calibrate turns a solved calibration into what an installer
// checks: the summary, the overlay of the pool grid on the frame (pixels,
// origin top-left), the rectified top-down view (RectMargin metres of deck
// around the pool) and the configuration YAML; and it reads the clicked
// points given on the command line.
package calibrate

import (
	"bytes"
	"fmt"
	"image"
	"image/color"
	"image/png"
	"io"
	"math"
	"os"
	"strconv"
	"strings"

	"gopkg.in/yaml.v3"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/homography"
	"stillwater/vision"
)

// PrintSummary writes the installer's summary.
func PrintSummary(w io.Writer, src string, size image.Point, cfg config.CalibrationConfig, cal *homography.Calibration) {
	fmt.Fprintf(w, "frame:      %s, %d×%d px\n", vision.Redact(src), size.X, size.Y)
	L, W := cal.Size()
	fit := cal.Fit()
	cam, hasCam, estimated := cal.Camera()
	fmt.Fprintf(w, "pool:       %g m × %g m, corners clicked at the %s\n", L, W, map[bool]string{true: "coping", false: "water line"}[cal.Coping() > 0])
	if fit.Points == 4 && !cfg.Freeform() {
		fmt.Fprintf(w, "reprojection: %.3f m / %.2f px RMS (four corners fit exactly; click accuracy shows in metres per pixel)\n", fit.RMSM, fit.RMSPx)
	} else {
		fmt.Fprintf(w, "reprojection: %.3f m RMS, worst %.3f m, %.2f px RMS over %d points\n", fit.RMSM, fit.WorstM, fit.RMSPx, fit.Points)
	}
	switch {
	case !hasCam:
		fmt.Fprintln(w, "camera:     position unknown (give -hfov, the lens, or -camera to enable refraction)")
	case estimated:
		fmt.Fprintf(w, "camera:     estimated at x %.2f m, y %.2f m, %.2f m above the water\n", cam.X, cam.Y, cam.Height)
	default:
		fmt.Fprintf(w, "camera:     measured at x %.2f m, y %.2f m, %.2f m above the water\n", cam.X, cam.Y, cam.Height)
	}
	near, far, nearName, farName := math.Inf(1), 0.0, "", ""
	for i, q := range []homography.Point{{X: 0, Y: 0}, {X: L, Y: 0}, {X: L, Y: W}, {X: 0, Y: W}} {
		p, ok := cal.Pixel(q)
		if !ok {
			continue
		}
		m := cal.MetresPerPixel(p)
		name := string(rune('A' + i))
		if m < near {
			near, nearName = m, name
		}
		if m > far {
			far, farName = m, name
		}
	}
	fmt.Fprintf(w, "scale:      %.3f m/px at the near end (corner %s), %.3f m/px at the far end (corner %s)\n", near, nearName, far, farName)
	if depth, ok := cal.Depth(); ok {
		fmt.Fprintf(w, "water:      %.2f m deep at x = 0, %.2f m at x = %g m; floor positions corrected for refraction (n = %.3f)\n", depth.At(0), depth.At(L), L, homography.WaterIndex)
	} else {
		fmt.Fprintln(w, "water:      no depth given; positions are reported on the surface")
	}
}

// YAML renders the configuration section with pixel pairs on
// one line each.
func YAML(cfg config.CalibrationConfig) ([]byte, error) {
	var n yaml.Node
	if err := n.Encode(cfg); err != nil {
		return nil, fmt.Errorf("encode calibration: %w", err)
	}
	flowPairs(&n)
	var b bytes.Buffer
	b.WriteString("# stillwater calibration: paste under the camera's entry in the config\n")
	enc := yaml.NewEncoder(&b)
	enc.SetIndent(2)
	if err := enc.Encode(&n); err != nil {
		return nil, fmt.Errorf("encode calibration: %w", err)
	}
	return b.Bytes(), nil
}

// flowPairs switches every sequence of scalars to flow style ([x, y]).
func flowPairs(n *yaml.Node) {
	if n.Kind == yaml.SequenceNode {
		scalars := len(n.Content) > 0
		for _, c := range n.Content {
			scalars = scalars && c.Kind == yaml.ScalarNode
		}
		if scalars {
			n.Style = yaml.FlowStyle
		}
	}
	for _, c := range n.Content {
		flowPairs(c)
	}
}

// WritePNG writes img to path as a PNG file.
func WritePNG(path string, img image.Image) error {
	var b bytes.Buffer
	enc := png.Encoder{CompressionLevel: png.BestCompression}
	if err := enc.Encode(&b, img); err != nil {
		return fmt.Errorf("encode %s: %w", path, err)
	}
	if err := os.WriteFile(path, b.Bytes(), 0o644); err != nil {
		return err
	}
	return nil
}

// surfaceLine samples the segment a→b on the water surface (pool
// metres) into frame pixels, so that lens curvature shows.
func surfaceLine(c *homography.Calibration, a, b homography.Point) []vision.Point {
	const n = 24
	var out []vision.Point
	for k := 0; k <= n; k++ {
		t := float64(k) / n
		if p, ok := c.Pixel(homography.Point{X: a.X + t*(b.X-a.X), Y: a.Y + t*(b.Y-a.Y)}); ok {
			out = append(out, vision.Point(p))
		}
	}
	return out
}

// OverlayStrokes are the pool outline, a 1 m grid on the water and the
// x and y axes at corner A, drawn through c into recorded pixels.
func OverlayStrokes(c *homography.Calibration) []vision.Stroke {
	L, W := c.Size()
	var s []vision.Stroke
	for x := 1.0; x < L-1e-9; x++ {
		s = append(s, vision.Stroke{Points: surfaceLine(c, homography.Point{X: x}, homography.Point{X: x, Y: W}), Color: colGrid, Width: 1})
	}
	for y := 1.0; y < W-1e-9; y++ {
		s = append(s, vision.Stroke{Points: surfaceLine(c, homography.Point{Y: y}, homography.Point{X: L, Y: y}), Color: colGrid, Width: 1})
	}
	if outline := c.Outline(); outline != nil {
		var px []vision.Point
		for _, q := range outline {
			if p, ok := c.Pixel(q); ok {
				px = append(px, vision.Point(p))
			}
		}
		s = append(s, vision.Stroke{Points: px, Closed: true, Color: colOutline, Width: 2})
	} else {
		corners := []homography.Point{{X: 0, Y: 0}, {X: L, Y: 0}, {X: L, Y: W}, {X: 0, Y: W}}
		for i := range corners {
			s = append(s, vision.Stroke{Points: surfaceLine(c, corners[i], corners[(i+1)%4]), Color: colOutline, Width: 2})
		}
	}
	s = append(s,
		vision.Stroke{Points: surfaceLine(c, homography.Point{}, homography.Point{X: 1}), Color: colX, Width: 3},
		vision.Stroke{Points: surfaceLine(c, homography.Point{}, homography.Point{Y: 1}), Color: colY, Width: 3})
	return s
}

// OverlayLabels name the corners A–D (pool metres) and the axes at
// their recorded pixels.
func OverlayLabels(c *homography.Calibration) []vision.Label {
	L, W := c.Size()
	var out []vision.Label
	add := func(q homography.Point, text string, col color.RGBA, dx, dy float64) {
		if p, ok := c.Pixel(q); ok {
			out = append(out, vision.Label{At: vision.Point{X: p.X + dx, Y: p.Y + dy}, Text: text, Color: col})
		}
	}
	add(homography.Point{}, "A (0,0)", colOutline, 6, -6)
	add(homography.Point{X: L}, fmt.Sprintf("B (%g,0)", L), colOutline, 6, -6)
	add(homography.Point{X: L, Y: W}, fmt.Sprintf("C (%g,%g)", L, W), colOutline, 6, -6)
	add(homography.Point{Y: W}, fmt.Sprintf("D (0,%g)", W), colOutline, 6, -6)
	add(homography.Point{X: 1.05}, "x", colX, 2, 4)
	add(homography.Point{Y: 1.05}, "y", colY, 2, 4)
	return out
}

// RectMargin is the deck shown around the pool in the rectified view, m.
const RectMargin = 1.0

// rectifiedH returns the transform from undistorted frame pixels to the
// rectified view at ppm pixels per metre, with the pool's corner A at
// (ppm·rectMargin, ppm·rectMargin), x to the right and y down, and the
// view's size.
func rectifiedH(c *homography.Calibration, ppm float64) (homography.H, image.Point) {
	o := ppm * RectMargin
	s := homography.H{ppm, 0, o, 0, ppm, o, 0, 0, 1}
	length, width := c.Size()
	size := image.Pt(int(math.Ceil(ppm*(length+2*RectMargin))), int(math.Ceil(ppm*(width+2*RectMargin))))
	return s.Mul(c.ToPlane()), size
}

// Rectify returns the top-down view of the calibration plane.
func Rectify(frame image.Image, c *homography.Calibration, ppm float64) (image.Image, error) {
	if lens, ok := c.Lens(); ok {
		k := lens.K
		var err error
		frame, err = vision.UndistortImage(frame, [9]float64{k.Fx, 0, k.Cx, 0, k.Fy, k.Cy, 0, 0, 1}, lens.Dist, lens.Model == homography.LensFisheye)
		if err != nil {
			return nil, err
		}
	}
	h, size := rectifiedH(c, ppm)
	return vision.WarpPerspective(frame, h, size)
}

// ParseReference reads "u,v=x,y ..." into reference points.
func ParseReference(s string) ([]config.ReferencePoint, error) {
	var out []config.ReferencePoint
	for i, f := range strings.Fields(s) {
		px, pool, ok := strings.Cut(f, "=")
		if !ok {
			return nil, fmt.Errorf("point %d %q: want u,v=x,y (pixel = pool metres)", i+1, f)
		}
		a, err1 := ParsePairs(px)
		b, err2 := ParsePairs(pool)
		if err1 != nil || err2 != nil || len(a) != 1 || len(b) != 1 {
			return nil, fmt.Errorf("point %d %q: want u,v=x,y (pixel = pool metres)", i+1, f)
		}
		out = append(out, config.ReferencePoint{Pixel: a[0], Pool: b[0]})
	}
	return out, nil
}

// ParsePairs reads "x,y x,y ..." (spaces, semicolons or newlines between
// pairs) into pixel pairs.
func ParsePairs(s string) ([][2]float64, error) {
	fields := strings.FieldsFunc(s, func(r rune) bool { return r == ' ' || r == '\n' || r == '\t' || r == ';' || r == '\r' })
	out := make([][2]float64, 0, len(fields))
	for i, f := range fields {
		xy := strings.Split(f, ",")
		if len(xy) != 2 {
			return nil, fmt.Errorf("point %d %q: want x,y", i+1, f)
		}
		x, err1 := strconv.ParseFloat(xy[0], 64)
		y, err2 := strconv.ParseFloat(xy[1], 64)
		if err1 != nil || err2 != nil {
			return nil, fmt.Errorf("point %d %q: x and y must be numbers", i+1, f)
		}
		out = append(out, [2]float64{x, y})
	}
	return out, nil
}

// ParseCoefficients reads comma-separated lens distortion coefficients.
func ParseCoefficients(s string) ([]float64, error) {
	var out []float64
	for _, f := range strings.Split(s, ",") {
		v, err := strconv.ParseFloat(strings.TrimSpace(f), 64)
		if err != nil {
			return nil, fmt.Errorf("%q is not a number", f)
		}
		out = append(out, v)
	}
	return out, nil
}

// Overlay colours (RGB).
var (
	colOutline = color.RGBA{255, 220, 0, 255}
	colGrid    = color.RGBA{255, 255, 255, 255}
	colX       = color.RGBA{230, 40, 40, 255}
	colY       = color.RGBA{40, 200, 60, 255}
)
