package config

import (
	"errors"
	"fmt"
	"image"
	"math"
	"time"

	"stillwater/homography"
)

// CalibrationConfig is what ties a camera's pixels to the pool. It is
// written inline under each camera (and printed by stillwater calibrate).
// Pixels are those of the camera's full-resolution frame (origin top-left,
// x right, y down) as recorded, before lens correction; pool metres have
// their origin at corner A, x along the length (A→B), y along the width
// (A→D).
//
// A rectangular pool gives pool and four corners. A freeform pool gives
// reference_points (four or more pixel ↔ pool-metre pairs) and outline
// (the water's edge in pixels); pool then only bounds the frame.
type CalibrationConfig struct {
	Pool    PoolConfig   `yaml:"pool"`
	Corners [][2]float64 `yaml:"corners"`
	// CornersOn says where the corners or reference points were clicked:
	// "water" (the water line, default) or "coping" (the top of the
	// coping, Coping metres above the water).
	CornersOn string `yaml:"corners_on,omitempty"`
	// Coping is the coping's height above the water line, metres; 0 takes
	// DefaultCopingHeight when corners_on is coping.
	Coping float64 `yaml:"coping_m,omitempty"`
	// Reference are pixel ↔ pool pairs for a freeform pool.
	Reference []ReferencePoint `yaml:"reference_points,omitempty"`
	// Outline is the water's edge in pixels; for a freeform pool it is
	// the watched area. Optional for a rectangular pool.
	Outline [][2]float64 `yaml:"outline,omitempty"`
	// Frame is the full-resolution frame size [width, height] the pixels
	// refer to; the daemon refuses a camera whose frames differ. With it,
	// every corner and point must lie inside the frame.
	Frame [2]int `yaml:"frame_px,omitempty"`
	// Lens corrects distortion and gives the intrinsics for the pose.
	Lens *LensConfig `yaml:"lens,omitempty"`
	// CameraPosition is the measured camera centre; when absent it is
	// estimated from the homography and the lens.
	CameraPosition *CameraPositionConfig `yaml:"camera_position,omitempty"`
	// Water is the depth model used to place targets on the floor.
	Water WaterConfig `yaml:"water,omitempty"`
	// ReferenceFrame is the PNG saved at calibration, for the camera-moved
	// check.
	ReferenceFrame string      `yaml:"reference_frame,omitempty"`
	Drift          DriftConfig `yaml:"drift,omitempty"`
}

// PoolConfig is the pool rectangle in metres.
type PoolConfig struct {
	Length float64 `yaml:"length_m"`
	Width  float64 `yaml:"width_m"`
}

// ReferencePoint pairs a clicked pixel with its measured pool position.
type ReferencePoint struct {
	Pixel [2]float64 `yaml:"pixel"`
	Pool  [2]float64 `yaml:"pool_m"`
}

// LensConfig is a camera's intrinsics and distortion, in pixels of the
// full-resolution frame. Either the focal lengths (fx, fy, cx, cy, from a
// chessboard calibration) or only hfov_deg (the data sheet's horizontal
// field of view, square pixels, centred principal point, no distortion).
type LensConfig struct {
	Model   string    `yaml:"model,omitempty"` // pinhole (default) or fisheye
	Fx      float64   `yaml:"fx,omitempty"`
	Fy      float64   `yaml:"fy,omitempty"`
	Cx      float64   `yaml:"cx,omitempty"`
	Cy      float64   `yaml:"cy,omitempty"`
	Dist    []float64 `yaml:"dist,omitempty"` // pinhole k1 k2 p1 p2 [k3]; fisheye k1 k2 k3 k4
	HFOVDeg float64   `yaml:"hfov_deg,omitempty"`
}

// CameraPositionConfig is the camera centre measured on site: pool metres
// and height above the water line.
type CameraPositionConfig struct {
	X      float64 `yaml:"x_m"`
	Y      float64 `yaml:"y_m"`
	Height float64 `yaml:"height_m"`
}

// WaterConfig is the depth of water over the floor, metres. Empty means
// positions are reported on the surface (no refraction). depth_m is a
// flat floor; shallow_m and deep_m a floor sloping along the length from
// shallow_x_m (default 0) to deep_x_m (default the pool length).
type WaterConfig struct {
	Depth    float64  `yaml:"depth_m,omitempty"`
	Shallow  float64  `yaml:"shallow_m,omitempty"`
	Deep     float64  `yaml:"deep_m,omitempty"`
	ShallowX float64  `yaml:"shallow_x_m,omitempty"`
	DeepX    *float64 `yaml:"deep_x_m,omitempty"`
}

// DriftConfig sets the camera-moved check against the reference frame.
type DriftConfig struct {
	// Every is how often the live frame is compared; 0 selects 5 s.
	Every Duration `yaml:"every,omitempty"`
	// MaxShift is the largest corner movement on the floor, metres,
	// before the camera counts as moved; 0 selects 0.2 m.
	MaxShift float64 `yaml:"max_shift_m,omitempty"`
}

// Default drift settings. 0.2 m is about the width of a child's head
// (WHO median head circumference at 12 months, 44.9–46.1 cm, is a
// diameter of 0.14–0.15 m), so a larger shift misplaces a target by more
// than the target itself.
const (
	defaultDriftEvery    = 5 * time.Second
	DefaultDriftMaxShift = 0.2
)

// WithDefaults returns d with zero fields filled in.
func (d DriftConfig) WithDefaults() DriftConfig {
	if d.Every == 0 {
		d.Every = Duration(defaultDriftEvery)
	}
	if d.MaxShift == 0 {
		d.MaxShift = DefaultDriftMaxShift
	}
	return d
}

// spec returns the plain description homography.NewCalibration solves.
func (c CalibrationConfig) spec() homography.CalibrationSpec {
	s := homography.CalibrationSpec{Length: c.Pool.Length, Width: c.Pool.Width}
	if c.Frame != [2]int{} {
		s.Frame = image.Pt(c.Frame[0], c.Frame[1])
	}
	if l, ok := c.Lens.lens(); ok {
		s.Lens = &l
	} else if c.Lens != nil {
		s.HFOVDeg = c.Lens.HFOVDeg
	}
	if c.CornersOn == "coping" {
		s.Coping = c.Coping
		if s.Coping == 0 {
			s.Coping = homography.DefaultCopingHeight
		}
	}
	for _, p := range c.Corners {
		s.Corners = append(s.Corners, homography.Point{X: p[0], Y: p[1]})
	}
	for _, r := range c.Reference {
		s.Reference = append(s.Reference, homography.ReferencePoint{
			Pixel: homography.Point{X: r.Pixel[0], Y: r.Pixel[1]},
			Pool:  homography.Point{X: r.Pool[0], Y: r.Pool[1]},
		})
	}
	if p := c.CameraPosition; p != nil {
		s.Camera = &homography.Camera{X: p.X, Y: p.Y, Height: p.Height}
	}
	if d, ok := c.Water.depthProfile(c.Pool.Length); ok {
		s.Depth = &d
	}
	for _, p := range c.Outline {
		s.Outline = append(s.Outline, homography.Point{X: p[0], Y: p[1]})
	}
	return s
}

// Freeform reports whether the calibration uses reference points.
func (c CalibrationConfig) Freeform() bool { return len(c.Reference) > 0 }

// depthProfile returns the floor model and whether one is configured.
func (w WaterConfig) depthProfile(length float64) (homography.DepthProfile, bool) {
	switch {
	case w.Depth > 0:
		return homography.FixedDepth(w.Depth), true
	case w.Shallow > 0 || w.Deep > 0:
		deepX := length
		if w.DeepX != nil {
			deepX = *w.DeepX
		}
		return homography.LinearFloor(w.Shallow, w.Deep, w.ShallowX, deepX), true
	}
	return homography.DepthProfile{}, false
}

// lens returns the configured lens as the homography package's type; ok
// is false when only a field of view (or nothing) is given.
func (l *LensConfig) lens() (homography.Lens, bool) {
	if l == nil || l.Fx == 0 {
		return homography.Lens{}, false
	}
	m := l.Model
	if m == "" {
		m = homography.LensPinhole
	}
	return homography.Lens{Model: m, K: homography.Intrinsics{Fx: l.Fx, Fy: l.Fy, Cx: l.Cx, Cy: l.Cy}, Dist: l.Dist}, true
}

func finite(vs ...float64) bool {
	for _, v := range vs {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return false
		}
	}
	return true
}

// ValidateCalibration checks one camera's calibration keys; where names
// the camera, e.g. "cameras[0] (north)".
func ValidateCalibration(where string, c CalibrationConfig) error {
	if c.Pool.Length <= 0 || c.Pool.Width <= 0 || !finite(c.Pool.Length, c.Pool.Width) {
		return fmt.Errorf("%s.pool: length_m %g and width_m %g must both be positive metres (for a freeform pool, the sides of a rectangle around it)", where, c.Pool.Length, c.Pool.Width)
	}
	if c.Frame != [2]int{} && (c.Frame[0] <= 0 || c.Frame[1] <= 0) {
		return fmt.Errorf("%s.frame_px: [%d, %d] must be the positive frame width and height in pixels", where, c.Frame[0], c.Frame[1])
	}
	if err := validatePixels(where, c); err != nil {
		return err
	}
	switch c.CornersOn {
	case "", "water", "coping":
	default:
		return fmt.Errorf("%s.corners_on: %q; want water (clicked at the water line) or coping (clicked on top of the coping)", where, c.CornersOn)
	}
	if c.Coping < 0 || c.Coping > 1 || !finite(c.Coping) {
		return fmt.Errorf("%s.coping_m: %g; give the coping's height above the water line in metres (typically 0.10–0.15)", where, c.Coping)
	}
	if c.Coping > 0 && c.CornersOn != "coping" {
		return fmt.Errorf("%s.coping_m: set, but corners_on is not coping; set corners_on: coping if the corners were clicked on the coping, or drop coping_m", where)
	}
	if err := validateLens(where+".lens", c.Lens); err != nil {
		return err
	}
	if p := c.CameraPosition; p != nil {
		if !finite(p.X, p.Y, p.Height) || p.Height <= 0 {
			return fmt.Errorf("%s.camera_position: height_m %g must be a positive height above the water line, x_m and y_m finite pool metres", where, p.Height)
		}
	}
	if err := validateWater(where+".water", c.Water, c.Pool.Length); err != nil {
		return err
	}
	if _, ok := c.Water.depthProfile(c.Pool.Length); ok && c.CameraPosition == nil && c.Lens == nil {
		return fmt.Errorf("%s.water: a depth needs the camera position for refraction; add camera_position (measured) or lens (hfov_deg at least) so it can be estimated", where)
	}
	if c.Drift.Every < 0 {
		return fmt.Errorf("%s.drift.every: %s is negative; give a period such as 5s", where, time.Duration(c.Drift.Every))
	}
	if c.Drift.MaxShift < 0 || !finite(c.Drift.MaxShift) {
		return fmt.Errorf("%s.drift.max_shift_m: %g; give a positive distance in metres such as 0.2", where, c.Drift.MaxShift)
	}
	return nil
}

func validatePixels(where string, c CalibrationConfig) error {
	// Without frame_px a pixel can only be checked for being a number:
	// a corner the camera does not see may be placed outside the picture.
	okPx := func(p [2]float64) bool {
		return finite(p[0], p[1]) && (c.Frame == [2]int{} ||
			(p[0] >= 0 && p[1] >= 0 && p[0] <= float64(c.Frame[0]) && p[1] <= float64(c.Frame[1])))
	}
	if c.Freeform() {
		if len(c.Corners) != 0 {
			return fmt.Errorf("%s: both corners and reference_points given; use corners for a rectangular pool or reference_points and outline for a freeform one", where)
		}
		if len(c.Reference) < 4 {
			return fmt.Errorf("%s.reference_points: %d given; a freeform pool needs at least 4 pixel ↔ pool_m pairs, spread around the pool", where, len(c.Reference))
		}
		for i, r := range c.Reference {
			if !okPx(r.Pixel) {
				return fmt.Errorf("%s.reference_points[%d].pixel: (%g, %g) is not a pixel inside the frame%s", where, i, r.Pixel[0], r.Pixel[1], frameNote(c.Frame))
			}
			if !finite(r.Pool[0], r.Pool[1]) {
				return fmt.Errorf("%s.reference_points[%d].pool_m: not finite metres", where, i)
			}
		}
		if len(c.Outline) < 3 {
			return fmt.Errorf("%s.outline: %d points; a freeform pool needs the water's edge as at least 3 pixel points in order around it", where, len(c.Outline))
		}
	} else if len(c.Corners) != 4 {
		return fmt.Errorf("%s.corners: %d given; list the 4 pool corners A, B, C, D in pixels, A at the origin, B along the length", where, len(c.Corners))
	}
	for i, p := range c.Corners {
		if !okPx(p) {
			return fmt.Errorf("%s.corners[%d] (corner %c): (%g, %g) is not a pixel inside the frame%s", where, i, 'A'+i, p[0], p[1], frameNote(c.Frame))
		}
	}
	if len(c.Outline) > 0 && len(c.Outline) < 3 {
		return fmt.Errorf("%s.outline: %d points; give at least 3 or leave it out", where, len(c.Outline))
	}
	for i, p := range c.Outline {
		if !okPx(p) {
			return fmt.Errorf("%s.outline[%d]: (%g, %g) is not a pixel inside the frame%s", where, i, p[0], p[1], frameNote(c.Frame))
		}
	}
	return nil
}

func frameNote(f [2]int) string {
	if f == [2]int{} {
		return ""
	}
	return fmt.Sprintf(" (frame_px %d×%d); click it inside the picture, or use reference_points for a pool whose corners are out of view", f[0], f[1])
}

func validateLens(where string, l *LensConfig) error {
	if l == nil {
		return nil
	}
	if l.HFOVDeg != 0 && (l.HFOVDeg <= 0 || l.HFOVDeg >= 180 || !finite(l.HFOVDeg)) {
		return fmt.Errorf("%s.hfov_deg: %g; give the horizontal field of view in degrees, between 0 and 180", where, l.HFOVDeg)
	}
	hl, ok := l.lens()
	if !ok {
		if l.HFOVDeg == 0 {
			return fmt.Errorf("%s: give fx, fy, cx, cy (and dist) from a chessboard calibration, or hfov_deg from the data sheet", where)
		}
		if len(l.Dist) > 0 || l.Fy != 0 || l.Cx != 0 || l.Cy != 0 {
			return fmt.Errorf("%s: dist, fy, cx or cy given without fx; give all of fx, fy, cx, cy", where)
		}
		if l.Model != "" && l.Model != homography.LensPinhole {
			return fmt.Errorf("%s.model: %q needs fx, fy, cx, cy and dist", where, l.Model)
		}
		return nil
	}
	if len(hl.Dist) == 0 {
		if hl.Model == homography.LensFisheye {
			hl.Dist = make([]float64, 4)
		} else {
			hl.Dist = make([]float64, 5)
		}
	}
	if err := hl.Validate(); err != nil {
		return fmt.Errorf("%s: %w", where, err)
	}
	return nil
}

func validateWater(where string, w WaterConfig, length float64) error {
	if !finite(w.Depth, w.Shallow, w.Deep, w.ShallowX) || (w.DeepX != nil && !finite(*w.DeepX)) {
		return fmt.Errorf("%s: depths and positions must be finite metres", where)
	}
	if w.Depth < 0 || w.Shallow < 0 || w.Deep < 0 {
		return fmt.Errorf("%s: depths must not be negative metres", where)
	}
	if w.Depth > 0 && (w.Shallow > 0 || w.Deep > 0) {
		return fmt.Errorf("%s: depth_m (a flat floor) and shallow_m/deep_m (a sloping one) both given; keep one", where)
	}
	if (w.Shallow > 0) != (w.Deep > 0) {
		return fmt.Errorf("%s: give both shallow_m and deep_m for a sloping floor, or depth_m for a flat one", where)
	}
	for _, d := range []float64{w.Depth, w.Shallow, w.Deep} {
		if d > 6 {
			return errors.New(where + fmt.Sprintf(": depth %g m is deeper than any residential pool; give metres, not feet or centimetres", d))
		}
	}
	if p, ok := w.depthProfile(length); ok {
		if err := p.Validate(); err != nil {
			return fmt.Errorf("%s: %w", where, err)
		}
	}
	return nil
}

// NewCalibration builds the runtime calibration of one camera from its
// configuration. Errors name the key and, for corners, the corner.
func NewCalibration(cam CameraConfig) (*homography.Calibration, error) {
	c, err := BuildCalibration(cam.CalibrationConfig)
	if err != nil {
		return nil, fmt.Errorf("camera %s: calibration: %w", cam.ID, err)
	}
	return c, nil
}

// BuildCalibration solves the calibration the keys describe.
func BuildCalibration(cfg CalibrationConfig) (*homography.Calibration, error) {
	return homography.NewCalibration(cfg.spec())
}
