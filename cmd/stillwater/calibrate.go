// Command stillwater calibrate solves one camera's pool calibration from a
// frame and the clicked corners, and draws pictures an installer can check
// by eye.
package main

import (
	"bytes"
	"context"
	"flag"
	"fmt"
	"image"
	"image/color"
	"image/png"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"gopkg.in/yaml.v3"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/watch"
	"stillwater/homography"
	"stillwater/vision"
)

// calibrateFlags are the command line of stillwater calibrate.
type calibrateFlags struct {
	frame, transport   string
	timeout            time.Duration
	corners, cornersIn string
	points, outline    string
	length, width      float64
	cornersOn          string
	coping             float64
	hfov               float64
	fx, fy, cx, cy     float64
	dist               string
	fisheye            bool
	camera             string
	depth, shallow     float64
	deep               float64
	out, overlay, rect string
	reference          string
	ppm                float64
	dataDir, id        string
	learn              time.Duration
}

func parseCalibrateFlags(args []string, stderr io.Writer) (calibrateFlags, error) {
	var f calibrateFlags
	fs := flag.NewFlagSet("calibrate", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.StringVar(&f.frame, "frame", "", "`source` of the frame: an image file, a clip (its first frame) or a camera URL")
	fs.StringVar(&f.transport, "transport", "", "RTSP `transport` for a camera URL: tcp or udp")
	fs.DurationVar(&f.timeout, "timeout", 10*time.Second, "how long to wait for a camera URL")
	fs.StringVar(&f.corners, "corners", "", `pool corners A B C D in pixels, "x,y x,y x,y x,y"; A is the origin, B along the length`)
	fs.StringVar(&f.cornersIn, "corners-file", "", "`file` with the four corners, one \"x,y\" a line (instead of -corners)")
	fs.StringVar(&f.points, "points", "", `freeform pool: four or more measured points "u,v=x,y ..." (pixel = pool metres), instead of corners`)
	fs.StringVar(&f.outline, "outline", "", `water's edge in pixels "u,v u,v ..." (required with -points)`)
	fs.Float64Var(&f.length, "length", 0, "pool length A→B in `metres` (freeform: of a rectangle around the pool)")
	fs.Float64Var(&f.width, "width", 0, "pool width A→D in `metres` (freeform: of a rectangle around the pool)")
	fs.StringVar(&f.cornersOn, "corners-on", "water", "where the corners were clicked: water (the water line) or coping")
	fs.Float64Var(&f.coping, "coping", 0, "coping height above the water in `metres` (default 0.12 with -corners-on coping)")
	fs.Float64Var(&f.hfov, "hfov", 0, "horizontal field of view in `degrees` (data sheet), to estimate the camera position")
	fs.Float64Var(&f.fx, "fx", 0, "focal length x in `pixels` (chessboard calibration)")
	fs.Float64Var(&f.fy, "fy", 0, "focal length y in `pixels`")
	fs.Float64Var(&f.cx, "cx", 0, "principal point x in `pixels`")
	fs.Float64Var(&f.cy, "cy", 0, "principal point y in `pixels`")
	fs.StringVar(&f.dist, "dist", "", `distortion "k1,k2,p1,p2[,k3]" (or "k1,k2,k3,k4" with -fisheye)`)
	fs.BoolVar(&f.fisheye, "fisheye", false, "the lens follows the fisheye (equidistant) model")
	fs.StringVar(&f.camera, "camera", "", `measured camera position "x,y,height" in metres (instead of estimating it)`)
	fs.Float64Var(&f.depth, "depth", 0, "flat floor depth in `metres`, for refraction")
	fs.Float64Var(&f.shallow, "shallow", 0, "depth at the shallow end (x = 0) in `metres`")
	fs.Float64Var(&f.deep, "deep", 0, "depth at the deep end (x = length) in `metres`")
	fs.StringVar(&f.out, "out", "", "write the calibration YAML to this `file` (default stdout)")
	fs.StringVar(&f.overlay, "overlay", "", "write the frame with outline, 1 m grid and axes to this PNG `file`")
	fs.StringVar(&f.rect, "rectified", "", "write a top-down view of the pool to this PNG `file`")
	fs.StringVar(&f.reference, "reference", "", "save the frame as the camera-moved reference to this PNG `file` (default: beside -out)")
	fs.Float64Var(&f.ppm, "ppm", 100, "scale of the rectified view in `pixels per metre`")
	fs.StringVar(&f.dataDir, "data-dir", "", "save the empty-pool reference the detector starts from under this data `directory` (the daemon's data_dir); needs a clip or a camera of the empty pool")
	fs.StringVar(&f.id, "id", "pool", "camera `id` in the daemon's config, for the empty-pool reference")
	fs.DurationVar(&f.learn, "learn", 10*time.Second, "how long to watch the empty pool for the reference")
	if err := fs.Parse(args); err != nil {
		return f, errUsage
	}
	if fs.NArg() > 0 {
		return f, fmt.Errorf("calibrate: unexpected argument %q: %w", fs.Arg(0), errUsage)
	}
	if f.frame == "" {
		return f, fmt.Errorf("calibrate: -frame is required (an image, a clip or a camera URL): %w", errUsage)
	}
	if n := btoi(f.corners != "") + btoi(f.cornersIn != "") + btoi(f.points != ""); n != 1 {
		return f, fmt.Errorf("calibrate: give the corners with either -corners or -corners-file, or a freeform pool's -points: %w", errUsage)
	}
	if f.points != "" && f.outline == "" {
		return f, fmt.Errorf("calibrate: -points needs -outline, the water's edge in pixels: %w", errUsage)
	}
	if f.dataDir != "" && !strings.Contains(f.frame, "://") && isStillImage(f.frame) {
		return f, fmt.Errorf("calibrate: -data-dir: the empty-pool reference needs a clip or a camera of the empty pool, not the still image %s: %w", f.frame, errUsage)
	}
	if f.learn < time.Second {
		return f, fmt.Errorf("calibrate: -learn %v: want at least 1s of the empty pool: %w", f.learn, errUsage)
	}
	if !(f.ppm >= 10 && f.ppm <= 1000) {
		return f, fmt.Errorf("calibrate: -ppm %g: want 10–1000 pixels per metre: %w", f.ppm, errUsage)
	}
	return f, nil
}

// isStillImage reports whether a -frame file is a picture, not a clip (the
// extensions OpenCV's imread takes that stillwater accepts).
func isStillImage(path string) bool {
	switch strings.ToLower(filepath.Ext(path)) {
	case ".png", ".jpg", ".jpeg", ".bmp", ".tif", ".tiff", ".webp":
		return true
	}
	return false
}

func btoi(b bool) int {
	if b {
		return 1
	}
	return 0
}

// parseReference reads "u,v=x,y ..." into reference points.
func parseReference(s string) ([]config.ReferencePoint, error) {
	var out []config.ReferencePoint
	for i, f := range strings.Fields(s) {
		px, pool, ok := strings.Cut(f, "=")
		if !ok {
			return nil, fmt.Errorf("point %d %q: want u,v=x,y (pixel = pool metres)", i+1, f)
		}
		a, err1 := parsePairs(px)
		b, err2 := parsePairs(pool)
		if err1 != nil || err2 != nil || len(a) != 1 || len(b) != 1 {
			return nil, fmt.Errorf("point %d %q: want u,v=x,y (pixel = pool metres)", i+1, f)
		}
		out = append(out, config.ReferencePoint{Pixel: a[0], Pool: b[0]})
	}
	return out, nil
}

// parsePairs reads "x,y x,y ..." (spaces, semicolons or newlines between
// pairs) into pixel pairs.
func parsePairs(s string) ([][2]float64, error) {
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

func parseCoefficients(s string) ([]float64, error) {
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

// calibrationFromFlags builds the configuration section from the flags
// and the frame's size.
func calibrationFromFlags(f calibrateFlags, size image.Point) (config.CalibrationConfig, error) {
	c := config.CalibrationConfig{Pool: config.PoolConfig{Length: f.length, Width: f.width}, Frame: [2]int{size.X, size.Y}}
	src := f.corners
	if f.cornersIn != "" {
		b, err := os.ReadFile(f.cornersIn)
		if err != nil {
			return c, fmt.Errorf("-corners-file: %w", err)
		}
		src = string(b)
	}
	var err error
	if f.points != "" {
		if c.Reference, err = parseReference(f.points); err != nil {
			return c, fmt.Errorf("-points: %w", err)
		}
		if c.Outline, err = parsePairs(f.outline); err != nil {
			return c, fmt.Errorf("-outline: %w", err)
		}
	} else if c.Corners, err = parsePairs(src); err != nil {
		return c, fmt.Errorf("corners: %w", err)
	}
	if f.cornersOn != "water" {
		c.CornersOn = f.cornersOn
	}
	c.Coping = f.coping
	if f.fx != 0 || f.dist != "" || f.fisheye {
		l := &config.LensConfig{Fx: f.fx, Fy: f.fy, Cx: f.cx, Cy: f.cy}
		if l.Fy == 0 {
			l.Fy = l.Fx
		}
		if f.fisheye {
			l.Model = homography.LensFisheye
		}
		if f.dist != "" {
			if l.Dist, err = parseCoefficients(f.dist); err != nil {
				return c, fmt.Errorf("-dist: %w", err)
			}
		}
		c.Lens = l
	} else if f.hfov != 0 {
		c.Lens = &config.LensConfig{HFOVDeg: f.hfov}
	}
	if f.camera != "" {
		v, err := parseCoefficients(f.camera)
		if err != nil || len(v) != 3 {
			return c, fmt.Errorf(`-camera %q: want "x,y,height" in metres`, f.camera)
		}
		c.CameraPosition = &config.CameraPositionConfig{X: v[0], Y: v[1], Height: v[2]}
	}
	c.Water = config.WaterConfig{Depth: f.depth, Shallow: f.shallow, Deep: f.deep}
	return c, nil
}

// runCalibrate is "stillwater calibrate".
func runCalibrate(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	f, err := parseCalibrateFlags(args, stderr)
	if err != nil {
		return err
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	frame, err := vision.GrabFrame(f.frame, f.transport, f.timeout)
	if err != nil {
		return fmt.Errorf("calibrate: %w", err)
	}
	size := frame.Bounds().Size()
	cfg, err := calibrationFromFlags(f, size)
	if err != nil {
		return fmt.Errorf("calibrate: %w", err)
	}
	if cfg.ReferenceFrame = f.reference; f.reference == "" && f.out != "" {
		cfg.ReferenceFrame = strings.TrimSuffix(f.out, filepath.Ext(f.out)) + "-reference.png"
	}
	if err := config.ValidateCalibration("calibration", cfg); err != nil {
		return fmt.Errorf("calibrate: %w", err)
	}
	cal, err := config.BuildCalibration(cfg)
	if err != nil {
		return fmt.Errorf("calibrate: %w", err)
	}
	report := stdout
	if f.out == "" {
		report = stderr // stdout carries the YAML
	}
	for i, p := range cal.Corners() {
		if p.X != cfg.Corners[i][0] || p.Y != cfg.Corners[i][1] {
			fmt.Fprintln(report, "note:       corners C and D were given in crossed order; the written calibration has them swapped back")
			for j, q := range cal.Corners() {
				cfg.Corners[j] = [2]float64{q.X, q.Y}
			}
			break
		}
	}
	printCalibration(report, f.frame, size, cfg, cal)
	if f.overlay != "" {
		img, err := vision.DrawOverlay(frame, overlayStrokes(cal), overlayLabels(cal))
		if err != nil {
			return fmt.Errorf("calibrate: overlay: %w", err)
		}
		if err := writePNGFile(f.overlay, img); err != nil {
			return fmt.Errorf("calibrate: overlay: %w", err)
		}
		fmt.Fprintf(report, "overlay:    %s\n", f.overlay)
	}
	if f.rect != "" {
		img, err := rectify(frame, cal, f.ppm)
		if err != nil {
			return fmt.Errorf("calibrate: rectified view: %w", err)
		}
		if err := writePNGFile(f.rect, img); err != nil {
			return fmt.Errorf("calibrate: rectified view: %w", err)
		}
		fmt.Fprintf(report, "rectified:  %s (%g px/m, %g m margin)\n", f.rect, f.ppm, rectMargin)
	}
	if cfg.ReferenceFrame != "" {
		if err := writePNGFile(cfg.ReferenceFrame, frame); err != nil {
			return fmt.Errorf("calibrate: reference frame: %w", err)
		}
		fmt.Fprintf(report, "reference:  %s (camera-moved check)\n", cfg.ReferenceFrame)
	} else {
		fmt.Fprintln(report, "reference:  not saved; give -reference or -out to enable the camera-moved check")
	}
	if f.dataDir != "" {
		cam := config.CameraConfig{ID: f.id, Source: f.frame, CalibrationConfig: cfg, Detect: config.DefaultDetect()}
		ref, grid, err := watch.LearnReference(ctx, cam, f.transport, f.timeout, f.learn)
		if err != nil {
			return fmt.Errorf("calibrate: empty-pool reference: %w", err)
		}
		if err := watch.SaveReference(f.dataDir, f.id, grid, ref, time.Now(), "saved by stillwater calibrate"); err != nil {
			return fmt.Errorf("calibrate: %w", err)
		}
		mean, _, _ := watch.ReferencePaths(f.dataDir, f.id)
		fmt.Fprintf(report, "empty pool: %s (%d×%d cells of %g m, %v watched; the detector starts from it)\n", mean, grid.Cols, grid.Rows, grid.Cell, f.learn)
	}
	y, err := calibrationYAML(cfg)
	if err != nil {
		return fmt.Errorf("calibrate: %w", err)
	}
	if f.out == "" {
		_, err = stdout.Write(y)
		return err
	}
	if err := os.WriteFile(f.out, y, 0o644); err != nil {
		return fmt.Errorf("calibrate: %w", err)
	}
	fmt.Fprintf(report, "wrote %s\n", f.out)
	return nil
}

// printCalibration writes the installer's summary.
func printCalibration(w io.Writer, src string, size image.Point, cfg config.CalibrationConfig, cal *homography.Calibration) {
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

// calibrationYAML renders the configuration section with pixel pairs on
// one line each.
func calibrationYAML(cfg config.CalibrationConfig) ([]byte, error) {
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

func writePNGFile(path string, img image.Image) error {
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

// Overlay colours (RGB).
var (
	colOutline = color.RGBA{255, 220, 0, 255}
	colGrid    = color.RGBA{255, 255, 255, 255}
	colX       = color.RGBA{230, 40, 40, 255}
	colY       = color.RGBA{40, 200, 60, 255}
)

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

func overlayStrokes(c *homography.Calibration) []vision.Stroke {
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

func overlayLabels(c *homography.Calibration) []vision.Label {
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

// rectMargin is the deck shown around the pool in the rectified view, m.
const rectMargin = 1.0

// rectifiedH returns the transform from undistorted frame pixels to the
// rectified view at ppm pixels per metre, with the pool's corner A at
// (ppm·rectMargin, ppm·rectMargin), x to the right and y down, and the
// view's size.
func rectifiedH(c *homography.Calibration, ppm float64) (homography.H, image.Point) {
	o := ppm * rectMargin
	s := homography.H{ppm, 0, o, 0, ppm, o, 0, 0, 1}
	length, width := c.Size()
	size := image.Pt(int(math.Ceil(ppm*(length+2*rectMargin))), int(math.Ceil(ppm*(width+2*rectMargin))))
	return s.Mul(c.ToPlane()), size
}

// rectify returns the top-down view of the calibration plane.
func rectify(frame image.Image, c *homography.Calibration, ppm float64) (image.Image, error) {
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
