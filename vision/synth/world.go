package synth

import (
	"fmt"
	"math"
)

// World is what a family scene holds beyond the named scenes' fields: the
// lens, the site, light, water, wind and weather, distractors, the sensor,
// the encoder and camera faults. A Scene with a World is drawn by the
// camera-space renderer (see wrender.go); then only Seed, FPS, Duration,
// Width, Height, PoolLength, PoolWidth, Camera, Intruders and Night of the
// Scene are read, and the rest comes from here.
//
// Colours are linear reflectances or radiances in B, G, R order (0–1 for
// surfaces). Positions are pool metres (origin at corner A, x along the
// length, y along the width, z up from the water surface).
type World struct {
	Variant  string      `json:"variant"`
	Lens     Lens        `json:"lens"`
	Site     Site        `json:"site"`
	Light    Light       `json:"light"`
	Water    WaterLook   `json:"water"`
	Wind     Wind        `json:"wind"`
	Clouds   *Clouds     `json:"clouds,omitempty"`
	Leaves   []Leaf      `json:"leaves,omitempty"`
	Birds    []BirdVisit `json:"birds,omitempty"`
	Walkers  []Walker    `json:"walkers,omitempty"`
	Lamps    []Lamp      `json:"lamps,omitempty"`
	Sensor   Sensor      `json:"sensor"`
	Encoding Encoding    `json:"encoding"`
	Faults   []Fault     `json:"faults,omitempty"`
}

// Lens is a pinhole camera with OpenCV's radial-tangential distortion, as a
// chessboard calibration (cv::calibrateCamera) reports it: focal lengths and
// principal point in pixels, Dist in OpenCV order k1 k2 p1 p2 k3. A world
// point with normalised pinhole coordinates (x, y) is drawn at pixel
// (Fx·x_d + Cx, Fy·y_d + Cy) with
//
//	r² = x² + y², a = 1 + k1 r² + k2 r⁴ + k3 r⁶
//	x_d = a·x + 2p1·x·y + p2·(r² + 2x²)
//	y_d = a·y + p1·(r² + 2y²) + 2p2·x·y
//
// so cv::undistortPoints with these values recovers the pinhole view.
type Lens struct {
	Fx   float64    `json:"fx"`
	Fy   float64    `json:"fy"`
	Cx   float64    `json:"cx"`
	Cy   float64    `json:"cy"`
	Dist [5]float64 `json:"dist"`
}

// K returns the 3×3 camera matrix, row-major.
func (l Lens) K() [9]float64 { return [9]float64{l.Fx, 0, l.Cx, 0, l.Fy, l.Cy, 0, 0, 1} }

// DepthProfile is the water depth along the pool length: piecewise linear
// through (X[i], D[i]), metres, constant beyond the ends; the floor is level
// across the width.
type DepthProfile struct {
	X []float64 `json:"x_m"`
	D []float64 `json:"depth_m"`
}

// At returns the depth at x, metres.
func (p DepthProfile) At(x float64) float64 {
	n := len(p.X)
	if n == 0 {
		return 0
	}
	if x <= p.X[0] {
		return p.D[0]
	}
	for i := 1; i < n; i++ {
		if x <= p.X[i] {
			a := (x - p.X[i-1]) / (p.X[i] - p.X[i-1])
			return p.D[i-1] + a*(p.D[i]-p.D[i-1])
		}
	}
	return p.D[n-1]
}

// Site is the pool's build and its surroundings.
type Site struct {
	// DeckHeight is how far the coping and deck stand above the water, m.
	DeckHeight float64      `json:"deck_height_m"`
	Depth      DepthProfile `json:"depth"`
	Floor      Floor        `json:"floor"`
	// Wall is the pool's inner wall; WaterlineTile is the band of tiles
	// at the water line, WaterlineM high (0 for none).
	Wall          RGB     `json:"wall"`
	WaterlineTile RGB     `json:"waterline_tile"`
	WaterlineM    float64 `json:"waterline_m"`
	Coping        RGB     `json:"coping"`
	CopingM       float64 `json:"coping_m"`
	Deck          Surface `json:"deck"`
	DeckM         float64 `json:"deck_m"`
	Lawn          RGB     `json:"lawn"`
	// Yard is how far the garden reaches beyond the pool edges, m: before
	// x = 0, after x = L, before y = 0, after y = W. A fence or hedge of
	// FenceM height bounds it.
	Yard   [4]float64 `json:"yard_m"`
	Fence  Surface    `json:"fence"`
	FenceM float64    `json:"fence_m"`
	Props  []Prop     `json:"props,omitempty"`
}

// RGB is a linear colour in B, G, R order.
type RGB [3]float64

// Floor is the pool floor finish.
type Floor struct {
	// Kind is plaster, tiles, pebble (dark) or liner.
	Kind   string  `json:"kind"`
	Base   RGB     `json:"base"`
	Second RGB     `json:"second"` // grout, mottling or pattern colour
	TileM  float64 `json:"tile_m,omitempty"`
	// Lanes is the number of dark lines along the length (0 for none).
	Lanes    int     `json:"lanes"`
	LaneRGB  RGB     `json:"lane"`
	LaneM    float64 `json:"lane_width_m,omitempty"`
	Mottle   float64 `json:"mottle"` // 0 even … 1 blotchy
	Sunk     int     `json:"sunk_leaves"`
	SunkSeed int64   `json:"sunk_seed"`
}

// Surface is a deck, fence or hedge finish.
type Surface struct {
	Kind   string  `json:"kind"`
	Base   RGB     `json:"base"`
	Second RGB     `json:"second"`
	SizeM  float64 `json:"size_m,omitempty"` // slab, board or leaf scale
}

// Prop is something flat lying on the deck (a towel, a mat, a chair seen
// from above): a rectangle centred at X, Y, rotated by AngleDeg.
type Prop struct {
	X        float64 `json:"x_m"`
	Y        float64 `json:"y_m"`
	L        float64 `json:"length_m"`
	W        float64 `json:"width_m"`
	AngleDeg float64 `json:"angle_deg"`
	Colour   RGB     `json:"colour"`
}

// Light is the illumination. By day the sun (direct, Sun on a surface
// facing it) and the sky (Ambient, on any surface); at night an infrared
// illuminator beside the lens (IR, falling off with distance squared) and
// pool lamps, seen in grey.
type Light struct {
	Night      bool    `json:"night"`
	SunElevDeg float64 `json:"sun_elevation_deg"`
	SunAzDeg   float64 `json:"sun_azimuth_deg"` // from +x towards +y
	Sun        float64 `json:"sun"`
	Ambient    float64 `json:"ambient"`
	SunTint    RGB     `json:"sun_tint"`
	SkyTint    RGB     `json:"sky_tint"`
	IR         float64 `json:"ir,omitempty"`
	// ExposureComp is the fraction of a change in scene light the camera's
	// auto exposure undoes (0 none, 1 all), with time constant ExposureTau.
	ExposureComp float64 `json:"exposure_comp"`
	ExposureTau  float64 `json:"exposure_tau_s"`
}

// WaterLook is the water's optics.
type WaterLook struct {
	// Absorb is the absorption coefficient per metre of path (B, G, R).
	Absorb RGB `json:"absorb_per_m"`
	// Scatter is the colour the water body itself adds (light scattered
	// back from within it) and Turbidity how fast it builds up, per m.
	Scatter   RGB     `json:"scatter"`
	Turbidity float64 `json:"turbidity_per_m"`
	// Caustics and Glitter scale the floor's light net and the sun's
	// glints on the surface: 0 faint … 1 strong.
	Caustics float64 `json:"caustics"`
	Glitter  float64 `json:"glitter"`
}

// Wind raises ripples: Slope is the RMS surface slope in calm air, DirDeg
// where the wind blows to, and gusts travel across the pool with it.
type Wind struct {
	Slope  float64 `json:"slope"`
	DirDeg float64 `json:"dir_deg"`
	Gusts  []Gust  `json:"gusts,omitempty"`
}

// Gust is a band of rougher water, WidthM wide, that raises the slope by
// Gain times at its centre, crossing the pool at SpeedMS; it builds and
// fades over its Dur seconds from Start.
type Gust struct {
	Start   float64 `json:"start_s"`
	Dur     float64 `json:"dur_s"`
	Gain    float64 `json:"gain"`
	WidthM  float64 `json:"width_m"`
	SpeedMS float64 `json:"speed_m_s"`
}

// Clouds is a field of cloud shadows drifting at SpeedMS towards DirDeg.
// Cover is the shaded fraction of the ground, EdgeM the width of a shadow
// edge and Block the fraction of sunlight a cloud removes. Cross is the
// media time at which a shadow edge crosses the pool centre.
type Clouds struct {
	Cover   float64 `json:"cover"`
	EdgeM   float64 `json:"edge_m"`
	Block   float64 `json:"block"`
	SpeedMS float64 `json:"speed_m_s"`
	DirDeg  float64 `json:"dir_deg"`
	Cross   float64 `json:"cross_s"`
	Seed    int64   `json:"seed"`
}

// Leaf floats on the water from Arrive, drifting at (VX, VY) m/s (faster in
// gusts) and turning at Spin rad/s.
type Leaf struct {
	X        float64 `json:"x_m"`
	Y        float64 `json:"y_m"`
	AreaM2   float64 `json:"area_m2"`
	Aspect   float64 `json:"aspect"`
	AngleDeg float64 `json:"angle_deg"`
	Colour   RGB     `json:"colour"`
	VX       float64 `json:"vx_m_s"`
	VY       float64 `json:"vy_m_s"`
	Spin     float64 `json:"spin_rad_s"`
	Arrive   float64 `json:"arrive_s"`
}

// BirdVisit flies in at Start, sits at (X, Y) for Stay seconds (on the water
// when OnWater, else on the coping) and flies off. LengthM is its body
// length; from above it covers about 0.25·LengthM².
type BirdVisit struct {
	Start   float64 `json:"start_s"`
	Stay    float64 `json:"stay_s"`
	X       float64 `json:"x_m"`
	Y       float64 `json:"y_m"`
	LengthM float64 `json:"length_m"`
	Colour  RGB     `json:"colour"`
	OnWater bool    `json:"on_water"`
	FromDeg float64 `json:"from_deg"`
}

// Walker is an adult walking on the deck along Path (deck metres), HeightM
// tall; the shadow falls where the sun sends it.
type Walker struct {
	Path    []Waypoint `json:"path"`
	HeightM float64    `json:"height_m"`
	Shirt   RGB        `json:"shirt"`
	Legs    RGB        `json:"legs"`
	Skin    RGB        `json:"skin"`
	Hair    RGB        `json:"hair"`
}

// Lamp is an underwater pool lamp in a wall, Power its brightness.
type Lamp struct {
	X     float64 `json:"x_m"`
	Y     float64 `json:"y_m"`
	Z     float64 `json:"z_m"`
	Power float64 `json:"power"`
}

// Sensor is the camera's noise: ReadNoise grey levels RMS in the dark,
// plus Shot·√level, and lens vignetting (fraction of light lost at the
// image corner).
type Sensor struct {
	ReadNoise float64 `json:"read_noise"`
	Shot      float64 `json:"shot"`
	Vignette  float64 `json:"vignette"`
}

// Encoding is the codec the clip is written with (through ffmpeg): mjpeg
// (AVI, quality Q as ffmpeg's -q:v), mpeg4 (mp4v FourCC in MP4, -q:v) or
// h264 (libx264 in MP4, -crf), with a key frame every GOP frames.
type Encoding struct {
	Codec   string `json:"codec"`
	Quality int    `json:"quality"`
	GOP     int    `json:"gop"`
}

// Fault kinds.
const (
	FaultBlack  = "black"
	FaultFrozen = "frozen"
	FaultNoise  = "noise"
)

// Fault is a camera fault over media time [From, To).
type Fault struct {
	Kind string  `json:"kind"`
	From float64 `json:"from_s"`
	To   float64 `json:"to_s"`
}

// ChildLook is how a family child looks and how big it is.
type ChildLook struct {
	Girl bool `json:"girl"`
	Skin RGB  `json:"skin"`
	Hair RGB  `json:"hair"`
	// HairM is how far the hair reaches below the crown (0 for a cap or
	// none), m.
	HairM float64 `json:"hair_m"`
	Suit  RGB     `json:"suit"`
	// Legs is the colour of the suit below the waist (shorts or a one-
	// piece); equal to Suit for a one-piece.
	Legs RGB `json:"legs"`
	// Scale multiplies the WHO median size for the age (individual
	// variation).
	Scale float64 `json:"scale"`
	// Spread is how far the arms reach out: 0 along the body, 1 straight
	// out to the sides.
	Spread float64 `json:"spread"`
}

func (w *World) validate(s Scene) error {
	l := w.Lens
	switch {
	case !(l.Fx > 0) || !(l.Fy > 0):
		return fmt.Errorf("lens focal length %g×%g px: want positive", l.Fx, l.Fy)
	case l.Cx < 0 || l.Cx > float64(s.Width) || l.Cy < 0 || l.Cy > float64(s.Height):
		return fmt.Errorf("lens principal point (%g, %g) outside the %dx%d image", l.Cx, l.Cy, s.Width, s.Height)
	case len(w.Site.Depth.X) == 0 || len(w.Site.Depth.X) != len(w.Site.Depth.D):
		return fmt.Errorf("depth profile: %d positions and %d depths; want the same, at least one", len(w.Site.Depth.X), len(w.Site.Depth.D))
	case w.Site.DeckHeight < 0 || w.Site.DeckHeight > 1:
		return fmt.Errorf("deck height %g m: want 0–1 m above the water", w.Site.DeckHeight)
	}
	for i, d := range w.Site.Depth.D {
		if !(d > 0.1) || d > 6 {
			return fmt.Errorf("depth profile: depth[%d] %g m outside 0.1–6 m", i, d)
		}
		if i > 0 && !(w.Site.Depth.X[i] > w.Site.Depth.X[i-1]) {
			return fmt.Errorf("depth profile: positions must increase (x[%d] = %g)", i, w.Site.Depth.X[i])
		}
	}
	switch w.Encoding.Codec {
	case "mjpeg", "mpeg4", "h264":
	default:
		return fmt.Errorf("encoding codec %q: want mjpeg, mpeg4 or h264", w.Encoding.Codec)
	}
	for i, f := range w.Faults {
		switch f.Kind {
		case FaultBlack, FaultFrozen, FaultNoise:
		default:
			return fmt.Errorf("fault %d: kind %q: want black, frozen or noise", i, f.Kind)
		}
		if !(f.To > f.From) {
			return fmt.Errorf("fault %d: ends (%g s) before it starts (%g s)", i, f.To, f.From)
		}
	}
	if _, _, ok := newLensCam(s.Camera, l).maxRadius(s.Width, s.Height); !ok {
		return fmt.Errorf("lens distortion %v folds back inside the %dx%d image", l.Dist, s.Width, s.Height)
	}
	return nil
}

func deg(d float64) float64 { return d * math.Pi / 180 }
