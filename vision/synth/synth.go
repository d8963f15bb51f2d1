// Package synth renders synthetic clips of a backyard pool seen by an
// overhead camera, with a ground-truth label file, for demos and tests.
//
// A top-down scene is drawn at PPM pixels per metre (pool metres, origin at
// pool corner A, x along the length, y along the width, z up from the water
// surface) and warped into a pinhole camera view. Everything is
// deterministic for a seed. The scenes are invented: they exercise the
// pipeline, they are not evidence about real water.
package synth

import (
	"errors"
	"fmt"
	"image"
	"math"
)

// Pose places the camera: position in pool metres, height above the water
// surface, yaw of the optical axis from the +x axis (degrees, towards +y),
// pitch below the horizontal (degrees) and horizontal field of view.
type Pose struct {
	X        float64 `json:"x_m"`
	Y        float64 `json:"y_m"`
	Height   float64 `json:"height_m"`
	YawDeg   float64 `json:"yaw_deg"`
	PitchDeg float64 `json:"pitch_deg"`
	HFOVDeg  float64 `json:"hfov_deg"`
	// RollDeg turns the camera about its optical axis; only family
	// scenes use it.
	RollDeg float64 `json:"roll_deg,omitempty"`
}

// Waypoint is where the intruder is at time T (seconds of media time).
type Waypoint struct {
	T, X, Y float64
}

// Child is an intruder: a child who gets into the water.
type Child struct {
	// Enter and Exit are media seconds; Exit 0 means until the end.
	Enter, Exit float64
	// Path is interpolated linearly; before the first and after the last
	// waypoint the intruder holds position.
	Path []Waypoint
	// AgeMonths selects the body size from the WHO growth medians (12, 24,
	// 36 or 48; others round to the nearest).
	AgeMonths int
	// Contrast is 1 for a fully visible child and about 0.2–0.4 for one
	// mostly under water.
	Contrast float64
	// Lying draws a child floating at the surface instead of upright.
	Lying bool
	// Depth is how far below the water surface the child is, metres (0 at
	// the surface). Path then gives its true position at that depth, and
	// it is drawn where the camera sees it: displaced by refraction at the
	// surface (Snell's law, water index WaterIndex) towards the camera.
	Depth float64

	// The fields below are read by the family renderer only. There the
	// path may start on the deck: the child walks to the edge and gets in,
	// and it is in the water while its centre is inside the pool.

	// Look is the child's skin, hair, suit and size; nil draws a default.
	Look *ChildLook `json:"look,omitempty"`
	// SinkAt and SinkDur ramp Depth and Contrast from the surface (0 and
	// 1) to their values over SinkDur seconds from media time SinkAt.
	SinkAt  float64 `json:"sink_at_s,omitempty"`
	SinkDur float64 `json:"sink_dur_s,omitempty"`
}

// WaterIndex is the refractive index of water the renderer bends sight
// lines with: 1.33299 for pure water at 20 °C (CRC Handbook of Chemistry
// and Physics), rounded.
const WaterIndex = 1.333

// Cloud dims the whole scene: it starts at Start, takes Ramp seconds to
// reach Depth (0–1 fraction of light removed), holds for Hold seconds and
// ramps back.
type Cloud struct {
	Start, Ramp, Hold, Depth float64
}

// Bird flies in at Start, lands at (X, Y) for Stay seconds and flies off.
type Bird struct {
	Start, Stay, X, Y float64
}

// Scene is everything that defines one clip.
type Scene struct {
	Seed       int64
	FPS        float64
	Duration   float64 // seconds
	Width      int     // camera image, px
	Height     int     // camera image, px
	PoolLength float64 // m, along x
	PoolWidth  float64 // m, along y
	PPM        float64 // top-down pixels per metre
	Camera     Pose

	Ripple     float64 // 0 calm … 1 windy
	Glints     float64 // expected new glints per frame
	Noise      float64 // sensor noise sigma, grey levels
	Leaves     int
	DeckWalker bool
	Night      bool
	Cloud      *Cloud
	Bird       *Bird
	Intruders  []Child
	// PanAt and PanDeg turn the camera by PanDeg of yaw at media time PanAt
	// (a bumped camera); zero PanDeg means no pan.
	PanAt, PanDeg float64
	// Codec is a FourCC for the video writer; empty selects MJPG. Family
	// scenes use World.Encoding instead.
	Codec string
	// World, when set, makes this a family scene (see FamilyScene) drawn
	// by the camera-space renderer.
	World *World `json:",omitempty"`
}

// Default returns a daylight scene: an 8 m × 4 m pool, the camera 5 m up
// behind corner A's end, 640×480 at 10 fps for 20 s, no intruder.
func Default() Scene {
	return Scene{
		Seed:       1,
		FPS:        10,
		Duration:   20,
		Width:      640,
		Height:     480,
		PoolLength: 8,
		PoolWidth:  4,
		PPM:        100,
		Camera:     Pose{X: -2, Y: 2, Height: 5, YawDeg: 0, PitchDeg: 50, HFOVDeg: 70},
		Ripple:     0.4,
		Glints:     3,
		Noise:      2,
	}
}

// Validate reports the first field that cannot be rendered.
func (s Scene) Validate() error {
	switch {
	case s.FPS <= 0 || s.FPS > 120:
		return fmt.Errorf("scene fps %g: want 0 < fps ≤ 120", s.FPS)
	case s.Duration <= 0:
		return fmt.Errorf("scene duration %g s: want > 0", s.Duration)
	case s.Width < 64 || s.Height < 48:
		return fmt.Errorf("scene size %dx%d: want at least 64x48", s.Width, s.Height)
	case s.PoolLength <= 0 || s.PoolWidth <= 0:
		return fmt.Errorf("pool %gx%g m: want positive length and width", s.PoolLength, s.PoolWidth)
	case s.World == nil && s.PPM < 10:
		return fmt.Errorf("ppm %g: want at least 10 px/m", s.PPM)
	case s.Camera.Height <= 0:
		return fmt.Errorf("camera height %g m: want above the water", s.Camera.Height)
	case s.Camera.HFOVDeg <= 1 || s.Camera.HFOVDeg >= 170:
		return fmt.Errorf("camera hfov %g°: want between 1 and 170", s.Camera.HFOVDeg)
	case s.Camera.PitchDeg <= 0 || s.Camera.PitchDeg > 90:
		return fmt.Errorf("camera pitch %g°: want looking down, 0 < pitch ≤ 90", s.Camera.PitchDeg)
	}
	if s.World != nil {
		if err := s.World.validate(s); err != nil {
			return fmt.Errorf("scene world: %w", err)
		}
	}
	for i, in := range s.Intruders {
		if len(in.Path) == 0 {
			return fmt.Errorf("intruder %d: empty path", i)
		}
		if in.Contrast < 0 || in.Contrast > 1 {
			return fmt.Errorf("intruder %d: contrast %g outside 0–1", i, in.Contrast)
		}
		if in.Depth < 0 || in.Depth > 5 || math.IsNaN(in.Depth) {
			return fmt.Errorf("intruder %d: depth %g m outside 0–5 m below the surface", i, in.Depth)
		}
	}
	return nil
}

// camera is a pinhole model of a Pose for an image size.
type camera struct {
	r      [3][3]float64 // rows: right, down, forward (world → camera)
	c      [3]float64    // centre in world metres
	f      float64       // focal length, px
	cx, cy float64       // principal point, px
}

func newCamera(p Pose, w, h int) camera {
	yaw := p.YawDeg * math.Pi / 180
	pitch := p.PitchDeg * math.Pi / 180
	fwd := [3]float64{math.Cos(pitch) * math.Cos(yaw), math.Cos(pitch) * math.Sin(yaw), -math.Sin(pitch)}
	// right = fwd × up, normalised; down = fwd × right.
	right := [3]float64{fwd[1], -fwd[0], 0}
	n := math.Hypot(right[0], right[1])
	right[0] /= n
	right[1] /= n
	down := [3]float64{
		fwd[1]*right[2] - fwd[2]*right[1],
		fwd[2]*right[0] - fwd[0]*right[2],
		fwd[0]*right[1] - fwd[1]*right[0],
	}
	return camera{
		r:  [3][3]float64{right, down, fwd},
		c:  [3]float64{p.X, p.Y, p.Height},
		f:  float64(w) / 2 / math.Tan(p.HFOVDeg*math.Pi/360),
		cx: float64(w) / 2,
		cy: float64(h) / 2,
	}
}

// project maps a world point to image pixels; ok is false behind the camera.
func (c camera) project(x, y, z float64) (u, v float64, ok bool) {
	d := [3]float64{x - c.c[0], y - c.c[1], z - c.c[2]}
	var q [3]float64
	for i := 0; i < 3; i++ {
		q[i] = c.r[i][0]*d[0] + c.r[i][1]*d[1] + c.r[i][2]*d[2]
	}
	if q[2] <= 1e-9 {
		return 0, 0, false
	}
	return c.f*q[0]/q[2] + c.cx, c.f*q[1]/q[2] + c.cy, true
}

// planeToImage returns the 3×3 matrix K·[r1 r2 t] mapping (x, y, 1) on the
// water plane z = 0 to homogeneous image pixels.
func (c camera) planeToImage() [9]float64 {
	var t [3]float64
	for i := 0; i < 3; i++ {
		t[i] = -(c.r[i][0]*c.c[0] + c.r[i][1]*c.c[1] + c.r[i][2]*c.c[2])
	}
	var m [9]float64
	for i := 0; i < 3; i++ {
		m[3*i+0] = c.r[i][0]
		m[3*i+1] = c.r[i][1]
		m[3*i+2] = t[i]
	}
	// K = [f 0 cx; 0 f cy; 0 0 1]
	var out [9]float64
	for j := 0; j < 3; j++ {
		out[j] = c.f*m[j] + c.cx*m[6+j]
		out[3+j] = c.f*m[3+j] + c.cy*m[6+j]
		out[6+j] = m[6+j]
	}
	return out
}

// horizonRow returns the first image row below which every pixel sees the
// ground (rows above it see the sky), or 0 when the whole image does.
func (c camera) horizonRow(p Pose) int {
	pitch := p.PitchDeg * math.Pi / 180
	v := c.cy - c.f*math.Tan(pitch)
	if v < 0 {
		return 0
	}
	return int(math.Ceil(v)) + 2
}

// ChildSize is the top-down body outline used for an intruder of an age.
type ChildSize struct {
	AgeMonths     int
	HeadDiameterM float64 // from head circumference / π
	ShoulderM     float64 // shoulder breadth
	LengthM       float64 // body length
}

// childSizes are WHO Child Growth Standards medians (boys), head
// circumference and length/height for age; shoulder breadth for 1–4 year
// olds of about 0.22–0.26 m is from memory.
var childSizes = []ChildSize{
	{12, 0.461 / math.Pi, 0.22, 0.757},
	{24, 0.483 / math.Pi, 0.235, 0.878},
	{36, 0.495 / math.Pi, 0.25, 0.961},
	{48, 0.502 / math.Pi, 0.26, 1.033},
}

// SizeForAge returns the body size nearest to the age in months.
func SizeForAge(months int) ChildSize {
	best := childSizes[0]
	for _, s := range childSizes {
		if abs(s.AgeMonths-months) < abs(best.AgeMonths-months) {
			best = s
		}
	}
	return best
}

func abs(x int) int {
	if x < 0 {
		return -x
	}
	return x
}

// position returns where the intruder is at time t and whether it is in
// the water then.
func (in Child) position(t float64) (x, y float64, present bool) {
	if t < in.Enter || (in.Exit > 0 && t >= in.Exit) {
		return 0, 0, false
	}
	p := in.Path
	if t <= p[0].T {
		return p[0].X, p[0].Y, true
	}
	for i := 1; i < len(p); i++ {
		if t <= p[i].T {
			a := (t - p[i-1].T) / (p[i].T - p[i-1].T)
			return p[i-1].X + a*(p[i].X-p[i-1].X), p[i-1].Y + a*(p[i].Y-p[i-1].Y), true
		}
	}
	last := p[len(p)-1]
	return last.X, last.Y, true
}

var errNoFrames = errors.New("scene has no frames")

func (s Scene) frameCount() int { return int(math.Round(s.Duration * s.FPS)) }

func (s Scene) margin() float64 { return 1.5 }

// topSize returns the top-down canvas size in pixels.
func (s Scene) topSize() image.Point {
	m := s.margin()
	return image.Pt(int(math.Ceil((s.PoolLength+2*m)*s.PPM)), int(math.Ceil((s.PoolWidth+2*m)*s.PPM)))
}
