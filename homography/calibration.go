package homography

import (
	"fmt"
	"image"
	"math"
)

// maxCalibrationRMS is the largest root-mean-square miss, metres on the
// calibration plane, accepted for reference points: a few centimetres,
// the accuracy a tape measure and a careful click give.
const maxCalibrationRMS = 0.05

// freeformInlier is the RANSAC inlier distance for reference points, metres.
const freeformInlier = 0.15

// Calibration is one camera's runtime mapping from frame pixels to the
// pool: lens correction, the homography onto the water (or coping) plane,
// and refraction down to the floor. Pixels are the full-resolution frame
// as recorded (origin top-left, y down); pool metres have their origin at
// corner A, x along the length, y along the width. It is immutable after
// NewCalibration and safe for concurrent reads. Build it once per camera
// and share it.
type Calibration struct {
	lens    Lens
	hasLens bool
	// toPlane maps undistorted pixels to pool metres on the plane the
	// points were clicked on; coping is that plane's height above the
	// water (0 for the water line).
	toPlane H
	toPx    H
	coping  float64
	// behind is the sign bit of toPlane's homogeneous scale on the pool's
	// side of the horizon line.
	behind bool

	cam       Camera
	hasCam    bool
	estimated bool // cam came from the homography, not a measurement
	pose      Pose

	depth   DepthProfile
	refract bool

	length, width float64
	// corners are the clicked corners A–D in the order used, recorded
	// pixels; ValidateCorners may have swapped C and D.
	corners []Point
	outline []Point // water's edge, pool metres on the surface; nil for the rectangle
	maskPx  []Point
	frame   image.Point

	// rmsM and worstM are the reprojection errors of the clicked points,
	// metres on the calibration plane; rmsPx the same in pixels.
	rmsM, worstM, rmsPx float64
	inliers, points     int
}

// CalibrationSpec is what one camera's calibration is solved from, as
// the installer measured and clicked it. Pixels are the full-resolution
// frame as recorded (origin top-left, y down); pool metres have their
// origin at corner A, x along the length, y along the width.
type CalibrationSpec struct {
	Length, Width float64 // pool size, metres
	// Frame is the recorded frame size in pixels; zero when not known.
	Frame image.Point
	// Lens is the measured lens model, nil for none; an empty Dist means
	// no distortion.
	Lens *Lens
	// HFOVDeg is the horizontal field of view, degrees, used to estimate
	// the camera's position when there is no Lens; 0 for none.
	HFOVDeg float64
	// Coping is the height of the plane the points were clicked on above
	// the water, metres; 0 for the water line.
	Coping float64
	// Corners are the pool corners A–D, recorded pixels; used when there
	// are no Reference points.
	Corners []Point
	// Reference are measured points for a freeform pool.
	Reference []ReferencePoint
	// Camera is the measured camera position, nil when not measured.
	Camera *Camera
	// Depth is the floor model for refraction, nil for none.
	Depth *DepthProfile
	// Outline is the water's edge, recorded pixels; nil for the
	// rectangle of the corners.
	Outline []Point
}

// ReferencePoint is one measured point of a freeform pool: where it is in
// the recorded frame (pixels) and on the pool (metres).
type ReferencePoint struct {
	Pixel, Pool Point
}

// freeform reports whether the calibration uses reference points.
func (s CalibrationSpec) freeform() bool { return len(s.Reference) > 0 }

// NewCalibration solves a camera's calibration. Errors name the setting
// and, for corners and points, which one.
func NewCalibration(cfg CalibrationSpec) (*Calibration, error) {
	c := &Calibration{length: cfg.Length, width: cfg.Width, frame: cfg.Frame, coping: cfg.Coping}
	if cfg.Lens != nil {
		l := *cfg.Lens
		if len(l.Dist) == 0 {
			l.Dist = make([]float64, 4)
		}
		if err := l.Validate(); err != nil {
			return nil, fmt.Errorf("lens: %w", err)
		}
		c.lens, c.hasLens = l, true
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
	if mid, ok := c.toPx.Map(Point{X: c.length / 2, Y: c.width / 2}); ok {
		c.behind = math.Signbit(c.toPlane.W(mid))
	}
	if err := c.placeCamera(cfg); err != nil {
		return nil, err
	}
	if c.coping > 0 && !c.hasCam {
		return nil, fmt.Errorf("corners_on coping: moving points down to the water needs the camera position; add camera_position or lens (hfov_deg and frame_px at least)")
	}
	if cfg.Depth != nil {
		if !c.hasCam {
			return nil, fmt.Errorf("water: refraction needs the camera position; add camera_position or lens (hfov_deg and frame_px at least)")
		}
		c.depth, c.refract = *cfg.Depth, true
	}
	if err := c.buildOutline(cfg); err != nil {
		return nil, err
	}
	return c, nil
}

// undistort maps a recorded pixel to the ideal pinhole pixel.
func (c *Calibration) undistort(p Point) (Point, error) {
	if !c.hasLens {
		return p, nil
	}
	return c.lens.Undistort(p)
}

func (c *Calibration) undistortAll(where string, px []Point) ([]Point, error) {
	out := make([]Point, len(px))
	for i, p := range px {
		u, err := c.undistort(p)
		if err != nil {
			return nil, fmt.Errorf("%s[%d]: %w; check the lens coefficients", where, i, err)
		}
		out[i] = u
	}
	return out, nil
}

func (c *Calibration) solveCorners(cfg CalibrationSpec) error {
	raw := append([]Point(nil), cfg.Corners...)
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
	pool := []Point{{X: 0, Y: 0}, {X: L, Y: 0}, {X: L, Y: W}, {X: 0, Y: W}}
	if c.toPlane, err = Solve(px, pool); err != nil {
		return fmt.Errorf("corners: %w", err)
	}
	if err := CheckSolution(c.toPlane, px, pool, maxCalibrationRMS); err != nil {
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
func (c *Calibration) validateCorners(raw []Point) ([]Point, error) {
	if c.frame != (image.Point{}) {
		return ValidateCorners(raw, c.frame.X, c.frame.Y)
	}
	var lo, hi Point
	for i, p := range raw {
		if !finite(p.X) || !finite(p.Y) {
			return nil, fmt.Errorf("%w: corner %c is (%v, %v), not a finite pixel position; click it again", ErrCornerOutsideImage, 'A'+i, p.X, p.Y)
		}
		if i == 0 {
			lo, hi = p, p
		}
		lo = Point{X: math.Min(lo.X, p.X), Y: math.Min(lo.Y, p.Y)}
		hi = Point{X: math.Max(hi.X, p.X), Y: math.Max(hi.Y, p.Y)}
	}
	if hi.X-lo.X > 1e6 || hi.Y-lo.Y > 1e6 || math.Abs(lo.X) > 1e6 || math.Abs(lo.Y) > 1e6 {
		return nil, fmt.Errorf("%w: corners span (%.0f, %.0f)–(%.0f, %.0f) px, far beyond any camera frame; check the numbers", ErrCornerOutsideImage, lo.X, lo.Y, hi.X, hi.Y)
	}
	off := Point{X: math.Max(0, -lo.X), Y: math.Max(0, -lo.Y)}
	moved := make([]Point, len(raw))
	for i, p := range raw {
		moved[i] = Point{X: p.X + off.X, Y: p.Y + off.Y}
	}
	w, h := int(math.Ceil(hi.X+off.X))+1, int(math.Ceil(hi.Y+off.Y))+1
	ordered, err := ValidateCorners(moved, w, h)
	if err != nil {
		return nil, err
	}
	for i := range ordered {
		ordered[i] = Point{X: ordered[i].X - off.X, Y: ordered[i].Y - off.Y}
	}
	return ordered, nil
}

func (c *Calibration) solveFreeform(cfg CalibrationSpec) error {
	raw := make([]Point, len(cfg.Reference))
	pool := make([]Point, len(cfg.Reference))
	for i, r := range cfg.Reference {
		raw[i], pool[i] = r.Pixel, r.Pool
	}
	px, err := c.undistortAll("reference_points", raw)
	if err != nil {
		return err
	}
	h, mask, err := SolveRobust(px, pool, freeformInlier)
	if err != nil {
		return fmt.Errorf("reference_points: %w; re-measure the points or add more", err)
	}
	for i, in := range mask {
		if !in {
			q, _ := h.Map(px[i])
			return fmt.Errorf("reference_points[%d]: pixel (%.1f, %.1f) maps to (%.2f, %.2f) m, not the measured (%.2f, %.2f) m; re-click or re-measure it", i, raw[i].X, raw[i].Y, q.X, q.Y, pool[i].X, pool[i].Y)
		}
	}
	if err := CheckSolution(h, px, pool, maxCalibrationRMS); err != nil {
		return fmt.Errorf("reference_points: %w", err)
	}
	c.toPlane = h
	c.setReprojection(px, pool, len(px))
	return nil
}

func (c *Calibration) setReprojection(px, pool []Point, n int) {
	c.rmsM, c.worstM = Reprojection(c.toPlane, px, pool)
	if inv, err := c.toPlane.Inverse(); err == nil {
		c.rmsPx, _ = Reprojection(inv, pool, px)
	}
	c.inliers, c.points = n, len(px)
}

// placeCamera sets the camera centre from the configuration, or estimates
// it from the homography and the intrinsics (lens, or a field of view).
func (c *Calibration) placeCamera(cfg CalibrationSpec) error {
	if p := cfg.Camera; p != nil {
		c.cam = *p
		c.hasCam = true
		return nil
	}
	var k Intrinsics
	switch {
	case c.hasLens:
		k = c.lens.K
	case cfg.HFOVDeg > 0:
		if c.frame == (image.Point{}) {
			return fmt.Errorf("lens.hfov_deg: needs frame_px (the frame size) to turn the field of view into a focal length")
		}
		var err error
		if k, err = IntrinsicsFromFOV(cfg.HFOVDeg, c.frame.X, c.frame.Y); err != nil {
			return fmt.Errorf("lens: %w", err)
		}
	default:
		return nil
	}
	pose, err := EstimatePose(c.toPlane, k)
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
func (c *Calibration) buildOutline(cfg CalibrationSpec) error {
	if len(cfg.Outline) > 0 {
		c.maskPx = append([]Point(nil), cfg.Outline...)
		if cfg.freeform() {
			c.outline = make([]Point, len(cfg.Outline))
			for i, p := range cfg.Outline {
				q, ok := c.Surface(p)
				if !ok {
					return fmt.Errorf("outline[%d]: pixel (%.1f, %.1f) does not map onto the pool plane (beyond the horizon); re-click it", i, p.X, p.Y)
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
	corners := []Point{{X: 0, Y: 0}, {X: L, Y: 0}, {X: L, Y: W}, {X: 0, Y: W}}
	n := 1
	if c.hasLens {
		n = 16
	}
	for i := range corners {
		a, b := corners[i], corners[(i+1)%4]
		for k := 0; k < n; k++ {
			t := float64(k) / float64(n)
			p, ok := c.pixelOnPlane(Point{X: a.X + t*(b.X-a.X), Y: a.Y + t*(b.Y-a.Y)})
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
func (c *Calibration) pixelOnPlane(q Point) (Point, bool) {
	u, ok := c.toPx.Map(q)
	if !ok {
		return Point{}, false
	}
	if c.hasLens {
		u = c.lens.Distort(u)
	}
	return Point{X: u.X, Y: u.Y}, true
}

// Pixel returns the recorded frame pixel that sees the point s on the
// water surface (pool metres); for drawing overlays.
func (c *Calibration) Pixel(s Point) (Point, bool) {
	q := s
	if c.coping > 0 {
		var err error
		if q, err = SurfaceToCoping(c.cam, s, c.coping); err != nil {
			return Point{}, false
		}
	}
	return c.pixelOnPlane(q)
}

// Surface maps a recorded pixel to pool metres on the water surface. It
// is false when the pixel is beyond the horizon or the lens model cannot
// be inverted there.
func (c *Calibration) Surface(px Point) (Point, bool) {
	u, err := c.undistort(Point{X: px.X, Y: px.Y})
	if err != nil {
		return Point{}, false
	}
	// Pixels on the far side of the horizon line map to a mirrored point.
	if math.Signbit(c.toPlane.W(u)) != c.behind {
		return Point{}, false
	}
	q, ok := c.toPlane.Map(u)
	if !ok {
		return Point{}, false
	}
	if c.coping > 0 {
		if q, err = CopingToSurface(c.cam, q, c.coping); err != nil {
			return Point{}, false
		}
	}
	return q, true
}

// Area returns the area of a pixel contour on the water surface, m².
func (c *Calibration) Area(contour []Point) float64 {
	poly := make([]Point, 0, len(contour))
	for _, p := range contour {
		q, ok := c.Surface(p)
		if !ok {
			return 0
		}
		poly = append(poly, q)
	}
	return PolygonArea(poly)
}

// Floor returns where a target seen at surface point s (pool metres)
// lies on the floor: the sight line is bent at the surface by Snell's law
// with water's index (WaterIndex, 1.333, CRC Handbook) and
// followed down to the configured depth. Without a depth model it is the
// surface point at depth 0. Both are pool metres.
func (c *Calibration) Floor(s Point) (p Point, depth float64) {
	if !c.refract {
		return s, 0
	}
	f, d, err := RefractToFloor(c.cam, s, c.depth, WaterIndex)
	if err != nil {
		return s, c.depth.At(s.X)
	}
	return f, d
}

// Inside reports whether a surface point (pool metres) is on the water:
// within the pool rectangle, or within the outline of a freeform pool.
func (c *Calibration) Inside(p Point) bool {
	if c.outline != nil {
		return insideOutline(p, c.outline)
	}
	return p.X >= 0 && p.Y >= 0 && p.X <= c.length && p.Y <= c.width
}

// Mask returns the water's outline in recorded pixels, for the detector.
func (c *Calibration) Mask() []Point { return append([]Point(nil), c.maskPx...) }

// CheckFrame reports whether frames of the given size match the
// calibration's frame_px.
func (c *Calibration) CheckFrame(size image.Point) error {
	if c.frame != (image.Point{}) && size != c.frame {
		return fmt.Errorf("frames are %d×%d px but the calibration was made on %d×%d px (frame_px); recalibrate or switch the camera back to that stream", size.X, size.Y, c.frame.X, c.frame.Y)
	}
	return nil
}

// MetresPerPixel returns the side in metres that one recorded pixel
// covers on the calibration plane at px.
func (c *Calibration) MetresPerPixel(px Point) float64 {
	u, err := c.undistort(Point{X: px.X, Y: px.Y})
	if err != nil {
		return math.Inf(1)
	}
	return MetresPerPixel(c.toPlane, u)
}

// PixelArea returns the water-surface area one recorded pixel covers at
// px, m²; for the detector's scale-aware clean-up.
func (c *Calibration) PixelArea(px Point) float64 {
	m := c.MetresPerPixel(px)
	return m * m
}

// insideOutline is the even-odd ray-crossing test.
func insideOutline(p Point, poly []Point) bool {
	in := false
	for i, j := 0, len(poly)-1; i < len(poly); j, i = i, i+1 {
		a, b := poly[i], poly[j]
		if (a.Y > p.Y) != (b.Y > p.Y) && p.X < (b.X-a.X)*(p.Y-a.Y)/(b.Y-a.Y)+a.X {
			in = !in
		}
	}
	return in
}

// DriftShift returns how far, in metres on the water surface, the pool's
// corners (or outline points) appear to have moved under a registration
// of the live frame to the reference: each corner's reference pixel is
// carried to the live frame by move (recorded pixels to live pixels) and
// mapped back to the pool with the
// calibration. A reported position is off by about this much. It is
// false when a moved corner leaves the pool plane (a large move).
func (c *Calibration) DriftShift(move func(Point) (Point, bool)) (float64, bool) {
	pts := c.outline
	if pts == nil {
		pts = []Point{{X: 0, Y: 0}, {X: c.length, Y: 0}, {X: c.length, Y: c.width}, {X: 0, Y: c.width}}
	}
	worst := 0.0
	for _, q := range pts {
		p, ok := c.Pixel(q)
		if !ok {
			return math.Inf(1), false
		}
		moved, ok := move(p)
		if !ok {
			return math.Inf(1), false
		}
		s, ok := c.Surface(moved)
		if !ok {
			return math.Inf(1), false
		}
		worst = math.Max(worst, s.Dist(q))
	}
	return worst, true
}

// finite reports whether v is neither NaN nor infinite.
func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

// Size returns the pool's length and width, metres.
func (c *Calibration) Size() (length, width float64) { return c.length, c.width }

// Corners returns the clicked corners A–D in the order used, recorded
// pixels (ValidateCorners may have swapped C and D); nil for a freeform
// pool.
func (c *Calibration) Corners() []Point { return append([]Point(nil), c.corners...) }

// Outline returns a freeform pool's water outline, pool metres on the
// surface; nil for the rectangle.
func (c *Calibration) Outline() []Point { return append([]Point(nil), c.outline...) }

// Coping returns the height above the water of the plane the points
// were clicked on, metres; 0 for the water line.
func (c *Calibration) Coping() float64 { return c.coping }

// Camera returns the camera centre in pool metres (height above the
// water); ok is false when it is neither measured nor estimable, and
// estimated is true when it came from the homography.
func (c *Calibration) Camera() (cam Camera, ok, estimated bool) {
	return c.cam, c.hasCam, c.estimated
}

// Depth returns the floor model and whether positions are corrected for
// refraction.
func (c *Calibration) Depth() (DepthProfile, bool) { return c.depth, c.refract }

// Lens returns the lens model and whether one is configured.
func (c *Calibration) Lens() (Lens, bool) { return c.lens, c.hasLens }

// ToPlane returns the homography from undistorted pixels to pool metres
// on the calibration plane.
func (c *Calibration) ToPlane() H { return c.toPlane }

// Frame returns the recorded frame size in pixels; zero when not known.
func (c *Calibration) Frame() image.Point { return c.frame }

// Fit is how well the clicked points fit the solved homography.
type Fit struct {
	RMSM, WorstM float64 // root-mean-square and worst miss, metres on the calibration plane
	RMSPx        float64 // root-mean-square miss, recorded pixels
	Inliers      int     // points used
	Points       int     // points given
}

// Fit returns the reprojection errors of the clicked points.
func (c *Calibration) Fit() Fit {
	return Fit{RMSM: c.rmsM, WorstM: c.worstM, RMSPx: c.rmsPx, Inliers: c.inliers, Points: c.points}
}
