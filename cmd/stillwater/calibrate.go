// Command stillwater calibrate solves one camera's pool calibration from a
// frame and the clicked corners, and draws pictures an installer can check
// by eye.
package main

import (
	"context"
	"flag"
	"fmt"
	"image"
	"io"
	"os"
	"path/filepath"
	"strings"
	"time"

	"stillwater/cmd/stillwater/internal/calibrate"
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
		if c.Reference, err = calibrate.ParseReference(f.points); err != nil {
			return c, fmt.Errorf("-points: %w", err)
		}
		if c.Outline, err = calibrate.ParsePairs(f.outline); err != nil {
			return c, fmt.Errorf("-outline: %w", err)
		}
	} else if c.Corners, err = calibrate.ParsePairs(src); err != nil {
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
			if l.Dist, err = calibrate.ParseCoefficients(f.dist); err != nil {
				return c, fmt.Errorf("-dist: %w", err)
			}
		}
		c.Lens = l
	} else if f.hfov != 0 {
		c.Lens = &config.LensConfig{HFOVDeg: f.hfov}
	}
	if f.camera != "" {
		v, err := calibrate.ParseCoefficients(f.camera)
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
	calibrate.PrintSummary(report, f.frame, size, cfg, cal)
	if f.overlay != "" {
		img, err := vision.DrawOverlay(frame, calibrate.OverlayStrokes(cal), calibrate.OverlayLabels(cal))
		if err != nil {
			return fmt.Errorf("calibrate: overlay: %w", err)
		}
		if err := calibrate.WritePNG(f.overlay, img); err != nil {
			return fmt.Errorf("calibrate: overlay: %w", err)
		}
		fmt.Fprintf(report, "overlay:    %s\n", f.overlay)
	}
	if f.rect != "" {
		img, err := calibrate.Rectify(frame, cal, f.ppm)
		if err != nil {
			return fmt.Errorf("calibrate: rectified view: %w", err)
		}
		if err := calibrate.WritePNG(f.rect, img); err != nil {
			return fmt.Errorf("calibrate: rectified view: %w", err)
		}
		fmt.Fprintf(report, "rectified:  %s (%g px/m, %g m margin)\n", f.rect, f.ppm, calibrate.RectMargin)
	}
	if cfg.ReferenceFrame != "" {
		if err := calibrate.WritePNG(cfg.ReferenceFrame, frame); err != nil {
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
	y, err := calibrate.YAML(cfg)
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
