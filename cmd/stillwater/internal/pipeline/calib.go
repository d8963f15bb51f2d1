package pipeline

import (
	"errors"
	"fmt"
	"math"
	"time"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/homography"
	"stillwater/vision"
)

// WaterMask returns the water's outline in recorded pixels, for the
// detector.
func WaterMask(c *homography.Calibration) []vision.Point {
	m := c.Mask()
	out := make([]vision.Point, len(m))
	for i, p := range m {
		out[i] = vision.Point(p)
	}
	return out
}

// FloorPosition returns where a target seen at surface point s (pool metres)
// lies on the floor, refraction included, as the alarm reports it.
func FloorPosition(c *homography.Calibration, s homography.Point) alert.FloorPosition {
	f, d := c.Floor(s)
	return alert.FloorPosition{X: f.X, Y: f.Y, Depth: d}
}

// driftLostAfter is how many registrations in a row may fail before the
// view counts as lost (lens covered, camera turned right away). One
// failure alone is common at dusk and with a person filling the deck.
const driftLostAfter = 3

// DriftChecker compares a camera's live frames with its calibration
// reference frame every few seconds of media time. Not safe for
// concurrent use; Close frees it.
type DriftChecker struct {
	ref    *vision.Drift
	cal    *homography.Calibration
	every  time.Duration
	max    float64
	next   time.Duration
	failed int
}

// DriftStatus is one comparison's outcome. Moved is set when the pool's
// corners moved more than the configured drift.max_shift_m (ShiftM,
// metres on the water surface). Lost is set when the shift cannot be
// measured: the live frame has not registered to the reference
// driftLostAfter times in a row, or a corner moved off the pool plane
// (then Moved is set too); ShiftM is 0 then.
type DriftStatus struct {
	ShiftM  float64
	Moved   bool
	Lost    bool
	Inliers int
	Err     error // the last registration error, when it failed
}

// NewDriftChecker loads the camera's reference frame. It returns nil and
// no error when the calibration names no reference frame.
func NewDriftChecker(cam config.CameraConfig, cal *homography.Calibration) (*DriftChecker, error) {
	if cam.ReferenceFrame == "" {
		return nil, nil
	}
	img, err := vision.GrabFrame(cam.ReferenceFrame, "", 0)
	if err != nil {
		return nil, fmt.Errorf("camera %s: reference_frame: %w", cam.ID, err)
	}
	if err := cal.CheckFrame(img.Bounds().Size()); err != nil {
		return nil, fmt.Errorf("camera %s: reference_frame %s: %w", cam.ID, cam.ReferenceFrame, err)
	}
	ref, err := vision.NewDrift(img, vision.DriftConfig{Water: WaterMask(cal)})
	if err != nil {
		return nil, fmt.Errorf("camera %s: reference_frame %s: %w", cam.ID, cam.ReferenceFrame, err)
	}
	d := cam.Drift.WithDefaults()
	return &DriftChecker{ref: ref, cal: cal, every: time.Duration(d.Every), max: d.MaxShift}, nil
}

// Due reports whether a check is due at media time t.
func (k *DriftChecker) Due(t time.Duration) bool { return k != nil && t >= k.next }

// Check registers the camera's latest frame (media time t) to the
// reference and schedules the next check.
func (k *DriftChecker) Check(t time.Duration, vc *vision.Camera) DriftStatus {
	k.next = t + k.every
	r, err := vc.CheckDrift(k.ref)
	if err != nil {
		k.failed++
		return DriftStatus{Lost: k.failed >= driftLostAfter, Err: err}
	}
	k.failed = 0
	shift, ok := k.cal.DriftShift(func(p homography.Point) (homography.Point, bool) {
		q, ok := r.Map(vision.Point(p))
		return homography.Point(q), ok
	})
	if !ok {
		// A corner moved off the pool plane: moved, by an unknown amount.
		return DriftStatus{Moved: true, Lost: true, Inliers: r.Inliers}
	}
	return DriftStatus{ShiftM: shift, Moved: shift > k.max, Inliers: r.Inliers}
}

// Close frees the reference features. Safe on a nil checker.
func (k *DriftChecker) Close() error {
	if k == nil {
		return nil
	}
	return k.ref.Close()
}

// rectification returns the top-down raster of the water surface the
// detector works on: square cells of cell metres over the pool's bounding
// box (the outline's, for a freeform pool) widened by deck metres of the
// deck around it, each mapped to the recorded
// pixel that sees its centre (lens, coping and homography included), with
// the cells on the water marked.
func rectification(c *homography.Calibration, cell, deck float64) (*vision.Rectification, error) {
	length, width := c.Size()
	outline := c.Outline()
	lo, hi := homography.Point{}, homography.Point{X: length, Y: width}
	if outline != nil {
		lo, hi = outline[0], outline[0]
		for _, p := range outline {
			lo = homography.Point{X: math.Min(lo.X, p.X), Y: math.Min(lo.Y, p.Y)}
			hi = homography.Point{X: math.Max(hi.X, p.X), Y: math.Max(hi.Y, p.Y)}
		}
	}
	lo = homography.Point{X: lo.X - deck, Y: lo.Y - deck}
	hi = homography.Point{X: hi.X + deck, Y: hi.Y + deck}
	g, err := homography.NewGrid(lo, hi, cell, c.Frame().X, c.Frame().Y, func(p homography.Point) (homography.Point, bool) {
		return c.Pixel(p)
	})
	if err != nil {
		return nil, fmt.Errorf("rectify the pool: %w", err)
	}
	water := make([]byte, g.CellsX*g.CellsY)
	for j := 0; j < g.CellsY; j++ {
		for i := 0; i < g.CellsX; i++ {
			if c.Inside(g.Centre(i, j)) {
				water[j*g.CellsX+i] = vision.CellWater
			} else {
				water[j*g.CellsX+i] = vision.CellDeck
			}
		}
	}
	r := &vision.Rectification{
		Cols: g.CellsX, Rows: g.CellsY, Cell: g.Cell, OriginX: g.Origin.X, OriginY: g.Origin.Y,
		MapX: g.MapX, MapY: g.MapY, Water: water, Src: c.Frame(),
	}
	if cam, ok, _ := c.Camera(); ok {
		r.Nadir = &vision.Point{X: cam.X, Y: cam.Y}
	}
	return r, nil
}

// ContourArea returns the area of a contour in recorded pixels on the water
// surface, m².
func ContourArea(c *homography.Calibration, contour []vision.Point) float64 {
	poly := make([]homography.Point, len(contour))
	for i, p := range contour {
		poly[i] = homography.Point(p)
	}
	return c.Area(poly)
}

// DetectorConfig is the vision stage's setup for a camera: the detect
// section, the pool outline as the watched mask and the pool-plane
// footprint of a pixel, so that clean-up is scale-aware. The daemon and
// replay both use it so that they see the same blobs.
func DetectorConfig(cam config.CameraConfig, cal *homography.Calibration) (vision.DetectorConfig, error) {
	d := cam.Detect
	if d.Method != "meanvar" {
		return vision.DetectorConfig{
			ProcessWidth: d.ProcessWidth, Method: d.Method, History: d.History,
			Threshold: d.Threshold, LearningRate: -1, MinPixels: 6, Mask: WaterMask(cal),
			MinArea: d.MinArea, PixelArea: func(p vision.Point) float64 { return cal.PixelArea(homography.Point(p)) },
		}, nil
	}
	grid, err := rectification(cal, d.Cell, max(0, d.Deck))
	if errors.Is(err, homography.ErrGridTooLarge) {
		// The range check passed; this pool and its deck are too large
		// for cells this small. Name the setting and the least that fits.
		length, width := cal.Size()
		deck := max(0, d.Deck)
		// 1 % over the bare quotient covers the cells rounded up at the
		// edges.
		least := 1.01 * math.Sqrt((length+2*deck)*(width+2*deck)/homography.MaxGridCells)
		return vision.DetectorConfig{}, fmt.Errorf("camera %s: detect.cell_m %g m is too small for a %gx%g m pool with %g m of deck; want at least %.3f m: %w",
			cam.ID, d.Cell, length, width, deck, math.Ceil(least*1000)/1000, err)
	}
	if err != nil {
		return vision.DetectorConfig{}, fmt.Errorf("camera %s: %w", cam.ID, err)
	}
	mv := vision.DefaultMeanVar()
	mv.FPS = 0 // the camera's own
	mv.Threshold, mv.Low, mv.Noise, mv.LightCell = d.Threshold, d.Extent, d.Noise, d.LightCell
	mv.Short, mv.Learn = time.Duration(d.ShortMean), time.Duration(d.Learn)
	mv.Smooth = d.Smooth
	// The mask is not searched by meanvar (its grid is the pool and its
	// deck), but the picture checks watch it (see vision.Camera.health).
	return vision.DetectorConfig{Method: "meanvar", Grid: grid, MeanVar: mv, Mask: WaterMask(cal)}, nil
}
