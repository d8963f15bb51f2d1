package main

import (
	"fmt"
	"image"
	"math"
	"time"

	"stillwater/alert"
	"stillwater/homography"
	"stillwater/vision"
)

// maxCalibrationRMS is the largest root-mean-square miss, metres on the
// calibration plane, accepted for reference points: a few centimetres,
// the accuracy a tape measure and a careful click give.
const maxCalibrationRMS = 0.05

// freeformInlier is the RANSAC inlier distance for reference points, metres.
const freeformInlier = 0.15

// calibration is one camera's runtime mapping from frame pixels to the
// pool: lens correction, the homography onto the water (or coping) plane,
// and refraction down to the floor. Pixels are the full-resolution frame
// as recorded (origin top-left, y down); pool metres have their origin at
// corner A, x along the length, y along the width. It is immutable after
// newCalibration and safe for concurrent reads.
type calibration struct {
	lens    homography.Lens
	hasLens bool
	// toPlane maps undistorted pixels to pool metres on the plane the
	// points were clicked on; coping is that plane's height above the
	// water (0 for the water line).
	toPlane homography.H
	toPx    homography.H
	coping  float64
	// behind is the sign bit of toPlane's homogeneous scale on the pool's
	// side of the horizon line.
	behind bool

	cam       homography.Camera
	hasCam    bool
	estimated bool // cam came from the homography, not a measurement
	pose      homography.Pose

	depth   homography.DepthProfile
	refract bool

	length, width float64
	// corners are the clicked corners A–D in the order used, recorded
	// pixels; ValidateCorners may have swapped C and D.
	corners []homography.Point
	outline []homography.Point // water's edge, pool metres on the surface; nil for the rectangle
	maskPx  []vision.Point
	frame   image.Point

	// rmsM and worstM are the reprojection errors of the clicked points,
	// metres on the calibration plane; rmsPx the same in pixels.
	rmsM, worstM, rmsPx float64
	inliers, points     int
}

// newCalibration builds the runtime calibration of one camera from its
// configuration. Errors name the key and, for corners, the corner.
func newCalibration(cam CameraConfig) (*calibration, error) {
	c, err := buildCalibration(cam.CalibrationConfig)
	if err != nil {
		return nil, fmt.Errorf("camera %s: calibration: %w", cam.ID, err)
	}
	return c, nil
}

func buildCalibration(cfg CalibrationConfig) (*calibration, error) {
	c := &calibration{length: cfg.Pool.Length, width: cfg.Pool.Width}
	if cfg.Frame != [2]int{} {
		c.frame = image.Pt(cfg.Frame[0], cfg.Frame[1])
	}
	if l, ok := cfg.Lens.lens(); ok {
		if len(l.Dist) == 0 {
			l.Dist = make([]float64, 4)
		}
		if err := l.Validate(); err != nil {
			return nil, fmt.Errorf("lens: %w", err)
		}
		c.lens, c.hasLens = l, true
	}
	if cfg.CornersOn == "coping" {
		c.coping = cfg.Coping
		if c.coping == 0 {
			c.coping = homography.DefaultCopingHeight
		}
	}
	var err error
	if cfg.freeform() {
		err = c.solveFreeform(cfg)
	} else {
		err = c.solveCorners(cfg)
	}
	if err != nil {
		return nil, err
	}
	if c.toPx, err = c.toPlane.Inverse(); err != nil {
		return nil, fmt.Errorf("invert homography: %w", err)
	}
	if mid, ok := c.toPx.Map(homography.Point{X: c.length / 2, Y: c.width / 2}); ok {
		c.behind = math.Signbit(c.toPlane.W(mid))
	}
	if err := c.placeCamera(cfg); err != nil {
		return nil, err
	}
	if c.coping > 0 && !c.hasCam {
		return nil, fmt.Errorf("corners_on coping: moving points down to the water needs the camera position; add camera_position or lens (hfov_deg and frame_px at least)")
	}
	if p, ok := cfg.Water.depthProfile(c.length); ok {
		if !c.hasCam {
			return nil, fmt.Errorf("water: refraction needs the camera position; add camera_position or lens (hfov_deg and frame_px at least)")
		}
		c.depth, c.refract = p, true
	}
	if err := c.buildOutline(cfg); err != nil {
		return nil, err
	}
	return c, nil
}

// undistort maps a recorded pixel to the ideal pinhole pixel.
func (c *calibration) undistort(p homography.Point) (homography.Point, error) {
	if !c.hasLens {
		return p, nil
	}
	return c.lens.Undistort(p)
}

func (c *calibration) undistortAll(where string, px []homography.Point) ([]homography.Point, error) {
	out := make([]homography.Point, len(px))
	for i, p := range px {
		u, err := c.undistort(p)
		if err != nil {
			return nil, fmt.Errorf("%s[%d]: %w; check the lens coefficients", where, i, err)
		}
		out[i] = u
	}
	return out, nil
}

func (c *calibration) solveCorners(cfg CalibrationConfig) error {
	raw := make([]homography.Point, len(cfg.Corners))
	for i, p := range cfg.Corners {
		raw[i] = homography.Point{X: p[0], Y: p[1]}
	}
	ordered, err := c.validateCorners(raw)
	if err != nil {
		return fmt.Errorf("corners: %w", err)
	}
	c.corners = ordered
	px, err := c.undistortAll("corners", ordered)
	if err != nil {
		return err
	}
	L, W := c.length, c.width
	pool := []homography.Point{{X: 0, Y: 0}, {X: L, Y: 0}, {X: L, Y: W}, {X: 0, Y: W}}
	if c.toPlane, err = homography.Solve(px, pool); err != nil {
		return fmt.Errorf("corners: %w", err)
	}
	if err := homography.CheckSolution(c.toPlane, px, pool, maxCalibrationRMS); err != nil {
		return fmt.Errorf("corners: %w", err)
	}
	c.setReprojection(px, pool, len(px))
	return nil
}

// validateCorners checks the corners' geometry, and that they lie in the
// frame when frame_px is known. Without it a corner may lie outside the
// picture (a corner the camera does not see, placed by extrapolation), so
// the geometric checks run on the corners shifted into positive pixels;
// they do not depend on where the origin is.
func (c *calibration) validateCorners(raw []homography.Point) ([]homography.Point, error) {
	if c.frame != (image.Point{}) {
		return homography.ValidateCorners(raw, c.frame.X, c.frame.Y)
	}
	var lo, hi homography.Point
	for i, p := range raw {
		if !finite(p.X, p.Y) {
			return nil, fmt.Errorf("%w: corner %c is (%v, %v), not a finite pixel position; click it again", homography.ErrCornerOutsideImage, 'A'+i, p.X, p.Y)
		}
		if i == 0 {
			lo, hi = p, p
		}
		lo = homography.Point{X: math.Min(lo.X, p.X), Y: math.Min(lo.Y, p.Y)}
		hi = homography.Point{X: math.Max(hi.X, p.X), Y: math.Max(hi.Y, p.Y)}
	}
	if hi.X-lo.X > 1e6 || hi.Y-lo.Y > 1e6 || math.Abs(lo.X) > 1e6 || math.Abs(lo.Y) > 1e6 {
		return nil, fmt.Errorf("%w: corners span (%.0f, %.0f)–(%.0f, %.0f) px, far beyond any camera frame; check the numbers", homography.ErrCornerOutsideImage, lo.X, lo.Y, hi.X, hi.Y)
	}
	off := homography.Point{X: math.Max(0, -lo.X), Y: math.Max(0, -lo.Y)}
	moved := make([]homography.Point, len(raw))
	for i, p := range raw {
		moved[i] = homography.Point{X: p.X + off.X, Y: p.Y + off.Y}
	}
	w, h := int(math.Ceil(hi.X+off.X))+1, int(math.Ceil(hi.Y+off.Y))+1
	ordered, err := homography.ValidateCorners(moved, w, h)
	if err != nil {
		return nil, err
	}
	for i := range ordered {
		ordered[i] = homography.Point{X: ordered[i].X - off.X, Y: ordered[i].Y - off.Y}
	}
	return ordered, nil
}

func (c *calibration) solveFreeform(cfg CalibrationConfig) error {
	raw := make([]homography.Point, len(cfg.Reference))
	pool := make([]homography.Point, len(cfg.Reference))
	for i, r := range cfg.Reference {
		raw[i] = homography.Point{X: r.Pixel[0], Y: r.Pixel[1]}
		pool[i] = homography.Point{X: r.Pool[0], Y: r.Pool[1]}
	}
	px, err := c.undistortAll("reference_points", raw)
	if err != nil {
		return err
	}
	h, mask, err := homography.SolveRobust(px, pool, freeformInlier)
	if err != nil {
		return fmt.Errorf("reference_points: %w; re-measure the points or add more", err)
	}
	for i, in := range mask {
		if !in {
			q, _ := h.Map(px[i])
			return fmt.Errorf("reference_points[%d]: pixel (%.1f, %.1f) maps to (%.2f, %.2f) m, not the measured (%.2f, %.2f) m; re-click or re-measure it", i, raw[i].X, raw[i].Y, q.X, q.Y, pool[i].X, pool[i].Y)
		}
	}
	if err := homography.CheckSolution(h, px, pool, maxCalibrationRMS); err != nil {
		return fmt.Errorf("reference_points: %w", err)
	}
	c.toPlane = h
	c.setReprojection(px, pool, len(px))
	return nil
}

func (c *calibration) setReprojection(px, pool []homography.Point, n int) {
	c.rmsM, c.worstM = homography.Reprojection(c.toPlane, px, pool)
	if inv, err := c.toPlane.Inverse(); err == nil {
		c.rmsPx, _ = homography.Reprojection(inv, pool, px)
	}
	c.inliers, c.points = n, len(px)
}

// placeCamera sets the camera centre from the configuration, or estimates
// it from the homography and the intrinsics (lens, or a field of view).
func (c *calibration) placeCamera(cfg CalibrationConfig) error {
	if p := cfg.CameraPosition; p != nil {
		c.cam = homography.Camera{X: p.X, Y: p.Y, Height: p.Height}
		c.hasCam = true
		return nil
	}
	var k homography.Intrinsics
	switch {
	case c.hasLens:
		k = c.lens.K
	case cfg.Lens != nil && cfg.Lens.HFOVDeg > 0:
		if c.frame == (image.Point{}) {
			return fmt.Errorf("lens.hfov_deg: needs frame_px (the frame size) to turn the field of view into a focal length")
		}
		var err error
		if k, err = homography.IntrinsicsFromFOV(cfg.Lens.HFOVDeg, c.frame.X, c.frame.Y); err != nil {
			return fmt.Errorf("lens: %w", err)
		}
	default:
		return nil
	}
	pose, err := homography.EstimatePose(c.toPlane, k)
	if err != nil {
		return fmt.Errorf("camera position: %w; measure it and set camera_position", err)
	}
	c.pose = pose
	c.cam = pose.Camera
	c.cam.Height += c.coping // the fitted plane is coping metres above the water
	c.hasCam, c.estimated = true, true
	return nil
}

// buildOutline sets the detector mask (pixels) and, for a freeform pool,
// the water outline in pool metres.
func (c *calibration) buildOutline(cfg CalibrationConfig) error {
	if len(cfg.Outline) > 0 {
		c.maskPx = make([]vision.Point, len(cfg.Outline))
		for i, p := range cfg.Outline {
			c.maskPx[i] = vision.Point{X: p[0], Y: p[1]}
		}
		if cfg.freeform() {
			c.outline = make([]homography.Point, len(cfg.Outline))
			for i, p := range cfg.Outline {
				q, ok := c.surface(vision.Point{X: p[0], Y: p[1]})
				if !ok {
					return fmt.Errorf("outline[%d]: pixel (%.1f, %.1f) does not map onto the pool plane (beyond the horizon); re-click it", i, p[0], p[1])
				}
				c.outline[i] = q
			}
		}
		return nil
	}
	// The rectangle's edges, sampled so that a curved (distorted) edge is
	// followed; 16 points an edge is well under a pixel of sag for any
	// lens that calibrates.
	L, W := c.length, c.width
	corners := []homography.Point{{X: 0, Y: 0}, {X: L, Y: 0}, {X: L, Y: W}, {X: 0, Y: W}}
	n := 1
	if c.hasLens {
		n = 16
	}
	for i := range corners {
		a, b := corners[i], corners[(i+1)%4]
		for k := 0; k < n; k++ {
			t := float64(k) / float64(n)
			p, ok := c.pixelOnPlane(homography.Point{X: a.X + t*(b.X-a.X), Y: a.Y + t*(b.Y-a.Y)})
			if !ok {
				return fmt.Errorf("corners: pool edge does not project into the frame; re-click the corners")
			}
			c.maskPx = append(c.maskPx, p)
		}
	}
	return nil
}

// pixelOnPlane returns the recorded pixel of a point on the calibration
// plane (pool metres).
func (c *calibration) pixelOnPlane(q homography.Point) (vision.Point, bool) {
	u, ok := c.toPx.Map(q)
	if !ok {
		return vision.Point{}, false
	}
	if c.hasLens {
		u = c.lens.Distort(u)
	}
	return vision.Point{X: u.X, Y: u.Y}, true
}

// pixel returns the recorded frame pixel that sees the point s on the
// water surface (pool metres); for drawing overlays.
func (c *calibration) pixel(s homography.Point) (vision.Point, bool) {
	q := s
	if c.coping > 0 {
		var err error
		if q, err = homography.SurfaceToCoping(c.cam, s, c.coping); err != nil {
			return vision.Point{}, false
		}
	}
	return c.pixelOnPlane(q)
}

// surface maps a recorded pixel to pool metres on the water surface. It
// is false when the pixel is beyond the horizon or the lens model cannot
// be inverted there.
func (c *calibration) surface(px vision.Point) (homography.Point, bool) {
	u, err := c.undistort(homography.Point{X: px.X, Y: px.Y})
	if err != nil {
		return homography.Point{}, false
	}
	// Pixels on the far side of the horizon line map to a mirrored point.
	if math.Signbit(c.toPlane.W(u)) != c.behind {
		return homography.Point{}, false
	}
	q, ok := c.toPlane.Map(u)
	if !ok {
		return homography.Point{}, false
	}
	if c.coping > 0 {
		if q, err = homography.CopingToSurface(c.cam, q, c.coping); err != nil {
			return homography.Point{}, false
		}
	}
	return q, true
}

// area returns the area of a pixel contour on the water surface, m².
func (c *calibration) area(contour []vision.Point) float64 {
	poly := make([]homography.Point, 0, len(contour))
	for _, p := range contour {
		q, ok := c.surface(p)
		if !ok {
			return 0
		}
		poly = append(poly, q)
	}
	return homography.PolygonArea(poly)
}

// floor returns where a target seen at surface point s (pool metres)
// lies on the floor: the sight line is bent at the surface by Snell's law
// with water's index (homography.WaterIndex, 1.333, CRC Handbook) and
// followed down to the configured depth. Without a depth model it is the
// surface point at depth 0.
func (c *calibration) floor(s homography.Point) alert.FloorPosition {
	if !c.refract {
		return alert.FloorPosition{X: s.X, Y: s.Y}
	}
	f, d, err := homography.RefractToFloor(c.cam, s, c.depth, homography.WaterIndex)
	if err != nil {
		return alert.FloorPosition{X: s.X, Y: s.Y, Depth: c.depth.At(s.X)}
	}
	return alert.FloorPosition{X: f.X, Y: f.Y, Depth: d}
}

// inside reports whether a surface point (pool metres) is on the water:
// within the pool rectangle, or within the outline of a freeform pool.
func (c *calibration) inside(p homography.Point) bool {
	if c.outline != nil {
		return insideOutline(p, c.outline)
	}
	return p.X >= 0 && p.Y >= 0 && p.X <= c.length && p.Y <= c.width
}

// mask returns the water's outline in recorded pixels, for the detector.
func (c *calibration) mask() []vision.Point { return append([]vision.Point(nil), c.maskPx...) }

// checkFrame reports whether frames of the given size match the
// calibration's frame_px.
func (c *calibration) checkFrame(size image.Point) error {
	if c.frame != (image.Point{}) && size != c.frame {
		return fmt.Errorf("frames are %d×%d px but the calibration was made on %d×%d px (frame_px); recalibrate or switch the camera back to that stream", size.X, size.Y, c.frame.X, c.frame.Y)
	}
	return nil
}

// metresPerPixel returns the side in metres that one recorded pixel
// covers on the calibration plane at px.
func (c *calibration) metresPerPixel(px vision.Point) float64 {
	u, err := c.undistort(homography.Point{X: px.X, Y: px.Y})
	if err != nil {
		return math.Inf(1)
	}
	return homography.MetresPerPixel(c.toPlane, u)
}

// pixelArea returns the water-surface area one recorded pixel covers at
// px, m²; for the detector's scale-aware clean-up.
func (c *calibration) pixelArea(px vision.Point) float64 {
	m := c.metresPerPixel(px)
	return m * m
}

// insideOutline is the even-odd ray-crossing test.
func insideOutline(p homography.Point, poly []homography.Point) bool {
	in := false
	for i, j := 0, len(poly)-1; i < len(poly); j, i = i, i+1 {
		a, b := poly[i], poly[j]
		if (a.Y > p.Y) != (b.Y > p.Y) && p.X < (b.X-a.X)*(p.Y-a.Y)/(b.Y-a.Y)+a.X {
			in = !in
		}
	}
	return in
}

// driftShift returns how far, in metres on the water surface, the pool's
// corners (or outline points) appear to have moved under a registration
// of the live frame to the reference: each corner's reference pixel is
// carried to the live frame by r and mapped back to the pool with the
// calibration. A reported position is off by about this much. It is
// false when a moved corner leaves the pool plane (a large move).
func (c *calibration) driftShift(r vision.DriftResult) (float64, bool) {
	pts := c.outline
	if pts == nil {
		pts = []homography.Point{{X: 0, Y: 0}, {X: c.length, Y: 0}, {X: c.length, Y: c.width}, {X: 0, Y: c.width}}
	}
	worst := 0.0
	for _, q := range pts {
		p, ok := c.pixel(q)
		if !ok {
			return math.Inf(1), false
		}
		moved, ok := r.Map(p)
		if !ok {
			return math.Inf(1), false
		}
		s, ok := c.surface(moved)
		if !ok {
			return math.Inf(1), false
		}
		worst = math.Max(worst, s.Dist(q))
	}
	return worst, true
}

// driftLostAfter is how many registrations in a row may fail before the
// view counts as lost (lens covered, camera turned right away). One
// failure alone is common at dusk and with a person filling the deck.
const driftLostAfter = 3

// driftChecker compares a camera's live frames with its calibration
// reference frame every few seconds of media time. Not safe for
// concurrent use; Close frees it.
type driftChecker struct {
	ref    *vision.Drift
	cal    *calibration
	every  time.Duration
	max    float64
	next   time.Duration
	failed int
}

// driftStatus is one comparison's outcome. Moved is set when the pool's
// corners moved more than the configured drift.max_shift_m (ShiftM,
// metres on the water surface). Lost is set when the shift cannot be
// measured: the live frame has not registered to the reference
// driftLostAfter times in a row, or a corner moved off the pool plane
// (then Moved is set too); ShiftM is 0 then.
type driftStatus struct {
	ShiftM  float64
	Moved   bool
	Lost    bool
	Inliers int
	Err     error // the last registration error, when it failed
}

// newDriftChecker loads the camera's reference frame. It returns nil and
// no error when the calibration names no reference frame.
func newDriftChecker(cam CameraConfig, cal *calibration) (*driftChecker, error) {
	if cam.ReferenceFrame == "" {
		return nil, nil
	}
	img, err := vision.GrabFrame(cam.ReferenceFrame, "", 0)
	if err != nil {
		return nil, fmt.Errorf("camera %s: reference_frame: %w", cam.ID, err)
	}
	if err := cal.checkFrame(img.Bounds().Size()); err != nil {
		return nil, fmt.Errorf("camera %s: reference_frame %s: %w", cam.ID, cam.ReferenceFrame, err)
	}
	ref, err := vision.NewDrift(img, vision.DriftConfig{Water: cal.mask()})
	if err != nil {
		return nil, fmt.Errorf("camera %s: reference_frame %s: %w", cam.ID, cam.ReferenceFrame, err)
	}
	d := cam.Drift.withDefaults()
	return &driftChecker{ref: ref, cal: cal, every: time.Duration(d.Every), max: d.MaxShift}, nil
}

// due reports whether a check is due at media time t.
func (k *driftChecker) due(t time.Duration) bool { return k != nil && t >= k.next }

// check registers the camera's latest frame (media time t) to the
// reference and schedules the next check.
func (k *driftChecker) check(t time.Duration, vc *vision.Camera) driftStatus {
	k.next = t + k.every
	r, err := vc.CheckDrift(k.ref)
	if err != nil {
		k.failed++
		return driftStatus{Lost: k.failed >= driftLostAfter, Err: err}
	}
	k.failed = 0
	shift, ok := k.cal.driftShift(r)
	if !ok {
		// A corner moved off the pool plane: moved, by an unknown amount.
		return driftStatus{Moved: true, Lost: true, Inliers: r.Inliers}
	}
	return driftStatus{ShiftM: shift, Moved: shift > k.max, Inliers: r.Inliers}
}

// Close frees the reference features. Safe on a nil checker.
func (k *driftChecker) Close() error {
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
func (c *calibration) rectification(cell, deck float64) (*vision.Rectification, error) {
	lo, hi := homography.Point{}, homography.Point{X: c.length, Y: c.width}
	if c.outline != nil {
		lo, hi = c.outline[0], c.outline[0]
		for _, p := range c.outline {
			lo = homography.Point{X: math.Min(lo.X, p.X), Y: math.Min(lo.Y, p.Y)}
			hi = homography.Point{X: math.Max(hi.X, p.X), Y: math.Max(hi.Y, p.Y)}
		}
	}
	lo = homography.Point{X: lo.X - deck, Y: lo.Y - deck}
	hi = homography.Point{X: hi.X + deck, Y: hi.Y + deck}
	g, err := homography.NewGrid(lo, hi, cell, c.frame.X, c.frame.Y, func(p homography.Point) (homography.Point, bool) {
		px, ok := c.pixel(p)
		return homography.Point{X: px.X, Y: px.Y}, ok
	})
	if err != nil {
		return nil, fmt.Errorf("rectify the pool: %w", err)
	}
	water := make([]byte, g.CellsX*g.CellsY)
	for j := 0; j < g.CellsY; j++ {
		for i := 0; i < g.CellsX; i++ {
			if c.inside(g.Centre(i, j)) {
				water[j*g.CellsX+i] = vision.CellWater
			} else {
				water[j*g.CellsX+i] = vision.CellDeck
			}
		}
	}
	return &vision.Rectification{
		Cols: g.CellsX, Rows: g.CellsY, Cell: g.Cell, OriginX: g.Origin.X, OriginY: g.Origin.Y,
		MapX: g.MapX, MapY: g.MapY, Water: water, Src: c.frame,
	}, nil
}
