package synth

import (
	"fmt"
	"hash/fnv"
	"math"
	"math/rand"
	"strings"
)

// Variant says what a family scene holds.
type Variant int

const (
	Quiet       Variant = iota // nobody in the water; any distractors
	Intruder                   // one child gets in (plus distractors)
	CameraFault                // a camera fault (black, frozen with key-frame re-encoding, or noise); nobody in the water
)

// Seed ranges of the family: disjoint; nobody tunes on the gate range.
const (
	TuningSeedMin, TuningSeedMax int64 = 1, 99_999
	GateSeedMin, GateSeedMax     int64 = 1_000_001, 1_099_999
)

func (v Variant) String() string {
	switch v {
	case Quiet:
		return "quiet"
	case Intruder:
		return "intruder"
	case CameraFault:
		return "fault"
	}
	return fmt.Sprintf("variant(%d)", int(v))
}

// ParseVariant reads a variant name: quiet, intruder or fault.
func ParseVariant(s string) (Variant, error) {
	for _, v := range []Variant{Quiet, Intruder, CameraFault} {
		if strings.EqualFold(s, v.String()) {
			return v, nil
		}
	}
	return 0, fmt.Errorf("variant %q: want quiet, intruder or fault", s)
}

// IsGateSeed reports whether seed belongs to the gate range.
func IsGateSeed(seed int64) bool { return seed >= GateSeedMin && seed <= GateSeedMax }

// draw is a named random stream of one family scene: each part of the
// scene draws from its own stream, so adding a draw to one part leaves the
// others as they were.
type draw struct{ *rand.Rand }

func newDraw(seed int64, v Variant, part string) draw {
	h := fnv.New64a()
	fmt.Fprintf(h, "stillwater/synth family %d %d %s", seed, int(v), part)
	return draw{rand.New(rand.NewSource(int64(h.Sum64() >> 1)))}
}

func (d draw) in(a, b float64) float64 { return a + (b-a)*d.Float64() }

func (d draw) chance(p float64) bool { return d.Float64() < p }

// pick returns an index with the given relative weights.
func (d draw) pick(w ...float64) int {
	var sum float64
	for _, x := range w {
		sum += x
	}
	r := d.Float64() * sum
	for i, x := range w {
		if r < x {
			return i
		}
		r -= x
	}
	return len(w) - 1
}

// jitter scales each channel of c by a factor in 1±f.
func (d draw) jitter(c RGB, f float64) RGB {
	for i := range c {
		c[i] = math.Max(0, math.Min(1, c[i]*d.in(1-f, 1+f)))
	}
	return c
}

// FamilyScene draws one scene of the randomised family, deterministic for
// (seed, v). Every (seed, variant) pair is its own world: the same seed with
// another variant draws another pool, camera and weather.
//
// The ranges drawn (see README): camera 2.5–6 m up behind any side or
// corner, horizontal field of view 60–110° with barrel distortion; image
// 640×360, 640×480, 704×576, 960×540 or 1280×720 at 10–20 fps; pools 3–5 m
// by 6–12 m (common practice) with plaster, tile, pebble or liner floors
// and lane lines; water colour, caustics and glitter from faint to strong;
// clouds with shadow edges moving at 2–10 m/s under a part-compensating
// auto exposure; gusts; leaves of 0.003–0.02 m²; birds; adults on the deck;
// night infrared with pool lamps; children aged 12–48 months of many
// looks, upright, lying or submerged (20–50 % contrast), entering from any
// side; sensor noise and MJPEG, MPEG-4 or H.264 compression; and camera
// faults.
func FamilyScene(seed int64, v Variant) Scene {
	s := Scene{Seed: seed, PPM: 100}
	w := &World{Variant: v.String()}
	s.World = w

	// Stream and timing.
	d := newDraw(seed, v, "stream")
	sizes := [][2]int{{640, 360}, {640, 480}, {704, 576}, {960, 540}, {1280, 720}}
	sz := sizes[d.pick(25, 10, 15, 20, 30)]
	s.Width, s.Height = sz[0], sz[1]
	s.FPS = []float64{10, 12, 15, 20}[d.pick(45, 10, 35, 10)]
	aspect := 1.0 // fy/fx
	if s.Width == 704 {
		// A D1 sub stream squeezes a 16:9 or a 4:3 picture into 704×576.
		aspect = []float64{1024.0 / 704, 12.0 / 11}[d.pick(1, 1)]
	}
	switch v {
	case Quiet:
		s.Duration = math.Round(d.in(60, 150))
	case Intruder:
		s.Duration = math.Round(d.in(35, 80))
	case CameraFault:
		s.Duration = math.Round(d.in(40, 80))
	}
	longStill := v == Intruder && d.chance(0.12)
	if longStill {
		s.Duration = math.Round(d.in(240, 330))
	}

	drawSite(&s, w)
	drawLight(&s, w)
	drawCamera(&s, w, aspect)
	drawWater(&s, w)
	drawWeather(&s, w)
	drawDistractors(&s, w)
	drawSensor(&s, w)
	switch v {
	case Intruder:
		s.Intruders = []Child{drawChild(&s, w, longStill)}
	case CameraFault:
		drawFault(&s, w)
	}
	return s
}

func drawSite(s *Scene, w *World) {
	d := newDraw(s.Seed, variantOf(w), "site")
	s.PoolLength = math.Round(d.in(6, 12)*10) / 10
	s.PoolWidth = math.Round(math.Min(d.in(3, 5), s.PoolLength-1.5)*10) / 10
	L := s.PoolLength
	site := &w.Site
	site.DeckHeight = d.in(0.08, 0.18)
	// Depth: common practice 0.9–1.2 m at the shallow end and up to about
	// 2.5 m at the deep end; some pools are level.
	shallow := d.in(0.9, 1.2)
	if d.chance(0.2) {
		site.Depth = DepthProfile{X: []float64{0}, D: []float64{d.in(1.1, 1.6)}}
	} else {
		deep := d.in(1.5, 2.5)
		a, b := L*d.in(0.3, 0.5), L*d.in(0.6, 0.8)
		site.Depth = DepthProfile{X: []float64{a, b}, D: []float64{shallow, deep}}
		if d.chance(0.5) { // deep end at x = 0
			site.Depth = DepthProfile{X: []float64{L - b, L - a}, D: []float64{deep, shallow}}
		}
	}
	f := &site.Floor
	switch d.pick(35, 25, 15, 10) {
	case 0:
		f.Kind = "plaster"
		f.Base = []RGB{{0.80, 0.80, 0.78}, {0.82, 0.72, 0.55}, {0.70, 0.70, 0.70}, {0.62, 0.70, 0.74}}[d.Intn(4)]
		f.Second = d.jitter(f.Base, 0.12)
		f.Mottle = d.in(0, 0.6)
	case 1:
		f.Kind = "tiles"
		f.Base = []RGB{{0.70, 0.45, 0.18}, {0.80, 0.80, 0.80}, {0.72, 0.62, 0.30}, {0.55, 0.55, 0.55}}[d.Intn(4)]
		f.Second = RGB{0.6, 0.62, 0.62}
		f.TileM = []float64{0.025, 0.05, 0.1, 0.2}[d.Intn(4)]
		f.Mottle = d.in(0, 0.3)
	case 2:
		f.Kind = "pebble"
		f.Base = []RGB{{0.06, 0.06, 0.06}, {0.03, 0.03, 0.035}, {0.16, 0.08, 0.03}, {0.06, 0.09, 0.05}}[d.Intn(4)]
		f.Second = d.jitter(f.Base, 0.5)
		f.Mottle = d.in(0.3, 1)
	case 3:
		f.Kind = "liner"
		f.Base = []RGB{{0.75, 0.58, 0.30}, {0.70, 0.65, 0.45}}[d.Intn(2)]
		f.Second = RGB{0.55, 0.35, 0.12}
		f.TileM = d.in(0.15, 0.4)
		f.Mottle = d.in(0, 0.2)
	}
	f.Base = d.jitter(f.Base, 0.08)
	if d.chance(0.45) {
		f.Lanes = 1 + d.Intn(3)
		f.LaneRGB = []RGB{{0.25, 0.08, 0.02}, {0.03, 0.03, 0.03}, {0.35, 0.15, 0.05}}[d.Intn(3)]
		f.LaneM = d.in(0.2, 0.3)
	}
	if d.chance(0.35) {
		f.Sunk = 1 + d.Intn(6)
		f.SunkSeed = d.Int63()
	}
	site.Wall = d.jitter(f.Base, 0.1)
	if f.Kind == "pebble" {
		site.Wall = d.jitter(RGB{0.2, 0.2, 0.2}, 0.3)
	}
	if d.chance(0.6) {
		site.WaterlineTile = []RGB{{0.45, 0.25, 0.05}, {0.5, 0.45, 0.3}, {0.1, 0.1, 0.1}, {0.6, 0.6, 0.6}}[d.Intn(4)]
		site.WaterlineM = d.in(0.1, 0.25)
	}
	site.Coping = []RGB{{0.75, 0.78, 0.80}, {0.55, 0.62, 0.70}, {0.5, 0.5, 0.5}, {0.35, 0.45, 0.55}}[d.Intn(4)]
	site.Coping = d.jitter(site.Coping, 0.08)
	site.CopingM = d.in(0.25, 0.4)
	switch d.pick(40, 25, 20, 15) {
	case 0:
		site.Deck = Surface{Kind: "pavers", Base: RGB{0.45, 0.52, 0.58}, Second: RGB{0.35, 0.38, 0.42}, SizeM: d.in(0.3, 0.8)}
	case 1:
		site.Deck = Surface{Kind: "concrete", Base: RGB{0.42, 0.44, 0.45}, Second: RGB{0.36, 0.38, 0.4}, SizeM: d.in(1.5, 3)}
	case 2:
		site.Deck = Surface{Kind: "wood", Base: RGB{0.12, 0.22, 0.35}, Second: RGB{0.08, 0.15, 0.25}, SizeM: d.in(0.1, 0.16)}
	case 3:
		site.Deck = Surface{Kind: "stone", Base: RGB{0.35, 0.42, 0.5}, Second: RGB{0.25, 0.3, 0.33}, SizeM: d.in(0.4, 0.9)}
	}
	site.Deck.Base = d.jitter(site.Deck.Base, 0.15)
	site.DeckM = d.in(1, 3)
	site.Lawn = d.jitter(RGB{0.04, 0.18, 0.10}, 0.25)
	for i := range site.Yard {
		site.Yard[i] = site.CopingM + site.DeckM + d.in(0.5, 6)
	}
	if d.chance(0.5) {
		site.Fence = Surface{Kind: "hedge", Base: d.jitter(RGB{0.03, 0.12, 0.05}, 0.3), Second: RGB{0.01, 0.05, 0.02}, SizeM: d.in(0.1, 0.3)}
	} else {
		site.Fence = Surface{Kind: "fence", Base: d.jitter([]RGB{{0.5, 0.5, 0.5}, {0.15, 0.25, 0.35}, {0.7, 0.72, 0.75}}[d.Intn(3)], 0.1), Second: RGB{0.2, 0.2, 0.2}, SizeM: d.in(0.1, 2)}
	}
	site.FenceM = d.in(1.2, 2.5)
	for i, n := 0, d.Intn(4); i < n; i++ {
		side := d.Intn(4)
		x, y := propSpot(d, side, s.PoolLength, s.PoolWidth, site.CopingM, site.DeckM)
		site.Props = append(site.Props, Prop{X: x, Y: y, L: d.in(0.6, 1.9), W: d.in(0.4, 0.8), AngleDeg: d.in(-20, 20) + float64(90*(side/2)),
			Colour: d.jitter([]RGB{{0.8, 0.8, 0.8}, {0.2, 0.3, 0.8}, {0.7, 0.4, 0.1}, {0.1, 0.6, 0.7}, {0.3, 0.3, 0.3}}[d.Intn(5)], 0.2)})
	}
}

// propSpot returns a point on the deck beside one side of the pool.
func propSpot(d draw, side int, L, W, coping, deck float64) (float64, float64) {
	off := coping + deck*d.in(0.35, 0.7)
	switch side {
	case 0:
		return d.in(0.5, L-0.5), -off
	case 1:
		return d.in(0.5, L-0.5), W + off
	case 2:
		return -off, d.in(0.5, W-0.5)
	}
	return L + off, d.in(0.5, W-0.5)
}

func variantOf(w *World) Variant {
	v, _ := ParseVariant(w.Variant)
	return v
}

func drawLight(s *Scene, w *World) {
	d := newDraw(s.Seed, variantOf(w), "light")
	l := &w.Light
	l.ExposureComp = d.in(0.3, 0.85)
	l.ExposureTau = d.in(0.5, 3)
	if d.chance(0.2) {
		l.Night = true
		s.Night = true
		l.Ambient = d.in(0.002, 0.01)
		l.IR = d.in(0.6, 1.6)
		l.SkyTint = RGB{1, 1, 1}
		l.SunTint = RGB{1, 1, 1}
		return
	}
	l.SunElevDeg = d.in(15, 70)
	l.SunAzDeg = d.in(-180, 180)
	l.Sun = d.in(0.85, 1.1)
	l.Ambient = d.in(0.15, 0.4)
	if d.chance(0.12) { // overcast: the sun is a glow
		l.Sun *= d.in(0.05, 0.2)
		l.Ambient = d.in(0.45, 0.7)
	}
	l.SunTint = d.jitter(RGB{0.90, 0.97, 1.0}, 0.04)
	l.SkyTint = d.jitter(RGB{1.0, 0.86, 0.72}, 0.06)
}

// drawCamera places the camera behind a side or a corner, aims it at the
// pool and widens the stand-off until the whole pool (with its coping) is
// in the picture, as an installer would.
func drawCamera(s *Scene, w *World, aspect float64) {
	d := newDraw(s.Seed, variantOf(w), "camera")
	L, W := s.PoolLength, s.PoolWidth
	h := d.in(2.5, 6)
	hfov := d.in(60, 110)
	mount := d.Intn(8) // 0–3 sides, 4–7 corners
	stand := d.in(0.2, 2.2) + w.Site.CopingM
	along := d.in(-0.3, 0.3)
	cornerTurn := d.in(-0.35, 0.35)
	tx, ty := L/2+d.in(-0.12, 0.12)*L, W/2+d.in(-0.12, 0.12)*W
	pitchJit := d.in(-3, 3)
	roll := d.in(-2, 2)
	strength := d.Float64()
	gamma := d.in(0.05, 0.35)
	eps := d.in(-0.03, 0.03)
	p1, p2 := d.in(-0.0015, 0.0015), d.in(-0.0015, 0.0015)
	dcx, dcy := d.in(-0.015, 0.015), d.in(-0.015, 0.015)

	place := func(stand float64) (float64, float64) {
		switch mount {
		case 0:
			return L/2 + along*L, -stand
		case 1:
			return L/2 + along*L, W + stand
		case 2:
			return -stand, W/2 + along*W
		case 3:
			return L + stand, W/2 + along*W
		}
		cx, cy := []float64{0, L, L, 0}[mount-4], []float64{0, 0, W, W}[mount-4]
		ax := math.Atan2(cy-W/2, cx-L/2) + cornerTurn
		return cx + stand*math.Cos(ax), cy + stand*math.Sin(ax)
	}
	var pose Pose
	var lens Lens
	for try := 0; ; try++ {
		x, y := place(stand)
		dist := math.Hypot(tx-x, ty-y)
		pose = Pose{X: x, Y: y, Height: h, YawDeg: math.Atan2(ty-y, tx-x) * 180 / math.Pi,
			PitchDeg: math.Atan2(h, dist)*180/math.Pi + pitchJit, RollDeg: roll}
		lens = drawLens(s.Width, s.Height, hfov, aspect, strength, gamma, eps, p1, p2, dcx, dcy)
		pose.HFOVDeg = newLensCam(pose, lens).hfov(s.Width)
		if try >= 60 || poolInView(pose, lens, s.Width, s.Height, L, W, w.Site.CopingM) {
			break
		}
		if try%6 == 5 && hfov < 110 {
			hfov = math.Min(110, hfov+4)
		} else {
			stand += 0.4
		}
	}
	s.Camera = pose
	w.Lens = lens
	// The garden reaches at least a metre behind the camera.
	y := &w.Site.Yard
	y[0] = math.Max(y[0], -pose.X+1)
	y[1] = math.Max(y[1], pose.X-L+1)
	y[2] = math.Max(y[2], -pose.Y+1)
	y[3] = math.Max(y[3], pose.Y-W+1)
}

// drawLens builds a barrel lens whose distorted picture spans hfov degrees
// across: the radial factor falls by strength·δmax at the image's side
// edge, δmax growing with the field of view (wide security-camera lenses
// lose 10–30 % there, narrow ones a few per cent; common practice). It
// weakens the distortion until the polynomial does not fold back inside
// the image.
func drawLens(width, height int, hfov, aspect, strength, gamma, eps, p1, p2, dcx, dcy float64) Lens {
	a := (hfov - 60) / 50
	delta := (0.01 + 0.04*a) + strength*(0.04+0.20*a)
	re := math.Tan(deg(hfov / 2)) // undistorted edge radius
	for {
		k1 := -delta / (re * re)
		k2 := delta * gamma / math.Pow(re, 4)
		k3 := eps * delta / math.Pow(re, 6)
		rd := re * (1 + k1*re*re + k2*math.Pow(re, 4) + k3*math.Pow(re, 6))
		fx := float64(width) / 2 / rd
		l := Lens{Fx: fx, Fy: fx * aspect, Cx: float64(width) * (0.5 + dcx), Cy: float64(height) * (0.5 + dcy),
			Dist: [5]float64{k1, k2, p1, p2, k3}}
		if _, _, ok := newLensCam(Pose{Height: 1, PitchDeg: 90}, l).maxRadius(width, height); ok || delta < 0.002 {
			return l
		}
		delta *= 0.85
	}
}

// poolInView reports whether the pool and its coping lie inside the image
// with a margin of 3 % of the width.
func poolInView(p Pose, l Lens, w, h int, L, W, coping float64) bool {
	c := newLensCam(p, l)
	m := 0.03 * float64(w)
	for _, q := range [][2]float64{{-coping, -coping}, {L + coping, -coping}, {L + coping, W + coping}, {-coping, W + coping}, {L / 2, -coping}, {L / 2, W + coping}, {-coping, W / 2}, {L + coping, W / 2}} {
		u, v, ok := c.project(q[0], q[1], 0)
		if !ok || u < m || v < m || u > float64(w)-m || v > float64(h)-m {
			return false
		}
	}
	return true
}

func drawWater(s *Scene, w *World) {
	d := newDraw(s.Seed, variantOf(w), "water")
	wl := &w.Water
	// Absorption of pure water, per metre, roughly 0.02 (blue), 0.07
	// (green) and 0.45 (red) (from memory of Pope & Fry 1997); pools with
	// algae or less chlorine absorb more blue and look greener.
	wl.Absorb = RGB{0.02 * d.in(0.8, 1.5), 0.07 * d.in(0.8, 1.3), 0.45 * d.in(0.85, 1.2)}
	wl.Scatter = d.jitter(RGB{0.55, 0.45, 0.12}, 0.2)
	wl.Turbidity = d.in(0.02, 0.15)
	if d.chance(0.15) {
		wl.Absorb[0] += d.in(0.1, 0.4)
		wl.Scatter = d.jitter(RGB{0.25, 0.45, 0.25}, 0.2)
		wl.Turbidity = d.in(0.15, 0.4)
	}
	wl.Caustics = math.Pow(d.Float64(), 0.8)
	wl.Glitter = d.Float64()
	if !w.Light.Night && wl.Glitter > 0.6 {
		// Strong glitter needs the sun ahead of the camera, at about the
		// elevation the camera looks down at.
		w.Light.SunAzDeg = s.Camera.YawDeg + d.in(-30, 30)
		w.Light.SunElevDeg = math.Max(15, math.Min(70, s.Camera.PitchDeg+d.in(-15, 10)))
	}
}

func drawWeather(s *Scene, w *World) {
	d := newDraw(s.Seed, variantOf(w), "weather")
	w.Wind.Slope = d.in(0.01, 0.07)
	w.Wind.DirDeg = d.in(-180, 180)
	for i, n := 0, d.pick(35, 35, 20, 10); i < n; i++ {
		w.Wind.Gusts = append(w.Wind.Gusts, Gust{Start: d.in(0, s.Duration), Dur: d.in(3, 15), Gain: d.in(1.5, 4), WidthM: d.in(3, 12), SpeedMS: d.in(2, 8)})
	}
	p := 0.25
	if variantOf(w) == Quiet {
		p = 0.45
	}
	if !w.Light.Night && w.Light.Sun > 0.5 && d.chance(p) {
		w.Clouds = &Clouds{Cover: d.in(0.3, 0.7), EdgeM: d.in(1, 10), Block: d.in(0.6, 0.95), SpeedMS: d.in(2, 10),
			DirDeg: d.in(-180, 180), Cross: d.in(3, s.Duration-3), Seed: d.Int63()}
	}
}

func drawDistractors(s *Scene, w *World) {
	d := newDraw(s.Seed, variantOf(w), "distractors")
	L, W := s.PoolLength, s.PoolWidth
	n := []int{0, 1 + d.Intn(4), 5 + d.Intn(11)}[d.pick(30, 40, 30)]
	for i := 0; i < n; i++ {
		leafCol := []RGB{{0.05, 0.25, 0.12}, {0.04, 0.18, 0.30}, {0.05, 0.35, 0.45}, {0.03, 0.10, 0.18}}[d.Intn(4)]
		arrive := 0.0
		if d.chance(0.3) {
			arrive = d.in(0, s.Duration)
		}
		sp, dir := d.in(0.005, 0.05), d.in(-math.Pi, math.Pi)
		w.Leaves = append(w.Leaves, Leaf{X: d.in(0.2, L-0.2), Y: d.in(0.2, W-0.2), AreaM2: d.in(0.003, 0.02), Aspect: d.in(1.3, 3),
			AngleDeg: d.in(0, 180), Colour: d.jitter(leafCol, 0.2), VX: sp * math.Cos(dir), VY: sp * math.Sin(dir), Spin: d.in(-0.1, 0.1), Arrive: arrive})
	}
	if d.chance(0.25) {
		onWater := d.chance(0.6)
		b := BirdVisit{Start: d.in(2, s.Duration*0.6), Stay: d.in(3, 40), LengthM: d.in(0.12, 0.35), OnWater: onWater, FromDeg: d.in(-180, 180),
			Colour: []RGB{{0.25, 0.25, 0.27}, {0.1, 0.1, 0.1}, {0.15, 0.2, 0.25}, {0.7, 0.7, 0.7}}[d.Intn(4)]}
		if onWater {
			b.X, b.Y = d.in(0.5, L-0.5), d.in(0.5, W-0.5)
		} else {
			side := d.Intn(4)
			c := w.Site.CopingM / 2
			b.X, b.Y = []float64{d.in(0.5, L-0.5), d.in(0.5, L-0.5), -c, L + c}[side], []float64{-c, W + c, d.in(0.3, W-0.3), d.in(0.3, W-0.3)}[side]
		}
		w.Birds = append(w.Birds, b)
	}
	pw := 0.3
	if w.Light.Night {
		pw = 0.15
	}
	for i, n := 0, 1+d.Intn(2); i < n && d.chance(pw); i++ {
		w.Walkers = append(w.Walkers, drawWalker(d, s, w))
	}
	if w.Light.Night {
		for i, n := 0, d.pick(30, 45, 25); i < n; i++ {
			side := d.Intn(4)
			x, y := []float64{d.in(0.2, 0.8) * L, d.in(0.2, 0.8) * L, 0.01, L - 0.01}[side], []float64{0.01, W - 0.01, d.in(0.3, 0.7) * W, d.in(0.3, 0.7) * W}[side]
			w.Lamps = append(w.Lamps, Lamp{X: x, Y: y, Z: -d.in(0.3, 0.5), Power: d.in(0.3, 1.2)})
		}
	}
}

// drawWalker sends an adult along one side of the deck. By day it prefers
// the side its shadow falls from onto the water.
func drawWalker(d draw, s *Scene, w *World) Walker {
	L, W := s.PoolLength, s.PoolWidth
	side := d.Intn(4)
	if !w.Light.Night && d.chance(0.7) {
		// The shadow points away from the sun: pick the side the sun is
		// behind, seen from the pool.
		az := deg(w.Light.SunAzDeg)
		sx, sy := math.Cos(az), math.Sin(az)
		switch {
		case math.Abs(sy) > math.Abs(sx) && sy < 0:
			side = 0 // y < 0
		case math.Abs(sy) > math.Abs(sx):
			side = 1
		case sx < 0:
			side = 2
		default:
			side = 3
		}
	}
	off := w.Site.CopingM + d.in(0.2, 0.9)
	start := d.in(0, s.Duration*0.7)
	speed := d.in(0.7, 1.4)
	var a, b [2]float64
	switch side {
	case 0:
		a, b = [2]float64{-1.5, -off}, [2]float64{L + 1.5, -off}
	case 1:
		a, b = [2]float64{-1.5, W + off}, [2]float64{L + 1.5, W + off}
	case 2:
		a, b = [2]float64{-off, -1.5}, [2]float64{-off, W + 1.5}
	default:
		a, b = [2]float64{L + off, -1.5}, [2]float64{L + off, W + 1.5}
	}
	if d.chance(0.5) {
		a, b = b, a
	}
	dur := math.Hypot(b[0]-a[0], b[1]-a[1]) / speed
	path := []Waypoint{{T: start, X: a[0], Y: a[1]}}
	if d.chance(0.4) { // stops half way for a while
		m := [2]float64{(a[0] + b[0]) / 2, (a[1] + b[1]) / 2}
		stop := d.in(2, 10)
		path = append(path, Waypoint{T: start + dur/2, X: m[0], Y: m[1]}, Waypoint{T: start + dur/2 + stop, X: m[0], Y: m[1]})
		dur += stop
	}
	path = append(path, Waypoint{T: start + dur, X: b[0], Y: b[1]})
	return Walker{Path: path, HeightM: d.in(1.55, 1.9),
		Shirt: d.jitter([]RGB{{0.8, 0.8, 0.8}, {0.5, 0.2, 0.1}, {0.1, 0.1, 0.6}, {0.2, 0.5, 0.2}, {0.1, 0.1, 0.1}}[d.Intn(5)], 0.2),
		Legs:  d.jitter([]RGB{{0.3, 0.2, 0.1}, {0.1, 0.1, 0.1}, {0.5, 0.55, 0.6}}[d.Intn(3)], 0.2),
		Skin:  skinTone(d), Hair: hairColour(d)}
}

// skinTone draws a skin reflectance from pale to dark brown (linear BGR,
// invented but ordered like the Fitzpatrick types).
func skinTone(d draw) RGB {
	t := d.Float64()
	pale, dark := RGB{0.45, 0.55, 0.75}, RGB{0.05, 0.08, 0.14}
	var c RGB
	for i := range c {
		c[i] = pale[i] + t*(dark[i]-pale[i])
	}
	return d.jitter(c, 0.06)
}

func hairColour(d draw) RGB {
	return d.jitter([]RGB{{0.02, 0.02, 0.025}, {0.04, 0.07, 0.12}, {0.12, 0.25, 0.40}, {0.04, 0.10, 0.30}, {0.3, 0.5, 0.6}}[d.pick(30, 30, 15, 10, 15)], 0.1)
}

func drawSensor(s *Scene, w *World) {
	d := newDraw(s.Seed, variantOf(w), "sensor")
	w.Sensor = Sensor{ReadNoise: d.in(0.6, 2.2), Shot: d.in(0.1, 0.4), Vignette: d.in(0.05, 0.35)}
	if w.Light.Night {
		w.Sensor.ReadNoise = d.in(2, 5)
		w.Sensor.Shot = d.in(0.3, 0.7)
	}
	e := &w.Encoding
	switch d.pick(30, 30, 40) {
	case 0:
		e.Codec, e.Quality = "mjpeg", 2+d.Intn(7)
	case 1:
		e.Codec, e.Quality = "mpeg4", 3+d.Intn(7)
	default:
		e.Codec, e.Quality = "h264", 21+d.Intn(10)
	}
	e.GOP = int(math.Round(s.FPS * d.in(1, 2)))
}

func drawFault(s *Scene, w *World) {
	d := newDraw(s.Seed, variantOf(w), "fault")
	kind := []string{FaultBlack, FaultFrozen, FaultNoise}[d.Intn(3)]
	from := math.Round(d.in(8, 25)*10) / 10
	to := s.Duration
	if d.chance(0.7) {
		to = math.Min(s.Duration, from+math.Round(d.in(5, 25)))
	}
	w.Faults = []Fault{{Kind: kind, From: from, To: to}}
}

// drawChild draws a child who walks to the edge, gets in and then swims,
// floats or sinks.
func drawChild(s *Scene, w *World, longStill bool) Child {
	d := newDraw(s.Seed, variantOf(w), "child")
	L, W := s.PoolLength, s.PoolWidth
	look := &ChildLook{Girl: d.chance(0.5), Skin: skinTone(d), Hair: hairColour(d), HairM: d.in(0, 0.15), Scale: d.in(0.93, 1.07), Spread: d.Float64()}
	// Suits: a third of them close to the water's own colours.
	suits := []RGB{{0.55, 0.35, 0.05}, {0.35, 0.45, 0.05}, {0.5, 0.5, 0.1}, {0.12, 0.45, 0.12}, {0.1, 0.1, 0.7}, {0.05, 0.6, 0.8},
		{0.4, 0.2, 0.7}, {0.05, 0.05, 0.05}, {0.7, 0.7, 0.7}, {0.1, 0.25, 0.8}, {0.4, 0.1, 0.1}}
	look.Suit = d.jitter(suits[d.Intn(len(suits))], 0.15)
	look.Legs = look.Suit
	if d.chance(0.4) {
		look.Legs = d.jitter(suits[d.Intn(len(suits))], 0.15)
	}
	if d.chance(0.15) {
		look.HairM = 0 // a swim cap
		look.Hair = d.jitter(suits[d.Intn(len(suits))], 0.1)
	}
	in := Child{AgeMonths: 12 + d.Intn(37), Contrast: 1, Look: look}
	margin := 0.45
	enter := d.in(6, 20)
	side := d.Intn(4)
	var edge, out, dir [2]float64 // entry point, start on the deck, unit inward
	switch side {
	case 0:
		edge, dir = [2]float64{d.in(0.6, L-0.6), 0}, [2]float64{0, 1}
	case 1:
		edge, dir = [2]float64{d.in(0.6, L-0.6), W}, [2]float64{0, -1}
	case 2:
		edge, dir = [2]float64{0, d.in(0.6, W-0.6)}, [2]float64{1, 0}
	default:
		edge, dir = [2]float64{L, d.in(0.6, W-0.6)}, [2]float64{-1, 0}
	}
	deckRun := d.in(0.8, 2)
	out = [2]float64{edge[0] - dir[0]*deckRun, edge[1] - dir[1]*deckRun}
	walk := d.in(0.4, 0.9)
	t0 := enter - deckRun/walk
	in.Enter = math.Max(0, t0)
	inPt := [2]float64{edge[0] + dir[0]*d.in(0.35, 0.6), edge[1] + dir[1]*d.in(0.35, 0.6)}
	in.Path = []Waypoint{{T: t0, X: out[0], Y: out[1]}, {T: enter - 0.15, X: edge[0] - dir[0]*0.15, Y: edge[1] - dir[1]*0.15},
		{T: enter + 0.8, X: inPt[0], Y: inPt[1]}}
	t, p := enter+0.8, inPt
	clampIn := func(x, y float64) [2]float64 {
		return [2]float64{math.Max(margin, math.Min(L-margin, x)), math.Max(margin, math.Min(W-margin, y))}
	}
	behaviour := d.pick(40, 35, 25) // upright, lying, submerged
	stillFrom := t + d.in(5, 25)
	if longStill {
		behaviour = 1 + d.Intn(2)
		stillFrom = t + d.in(2, 15)
	}
	if behaviour == 2 && w.Light.Night && len(w.Lamps) < 2 {
		// Near infrared hardly enters water: at night only pool lamps
		// show a submerged child, so without them it floats.
		behaviour = 1
	}
	speed := []float64{d.in(0.1, 0.4), d.in(0.02, 0.12), d.in(0.02, 0.1)}[behaviour]
	for t < s.Duration && t < stillFrom {
		ang := d.in(-math.Pi, math.Pi)
		step := d.in(0.5, 2)
		q := clampIn(p[0]+step*math.Cos(ang), p[1]+step*math.Sin(ang))
		t += math.Max(1, math.Hypot(q[0]-p[0], q[1]-p[1])/speed)
		p = q
		in.Path = append(in.Path, Waypoint{T: t, X: p[0], Y: p[1]})
	}
	if d.chance(0.3) && !longStill && behaviour == 0 {
		stillFrom = s.Duration // keeps paddling about
		for t < s.Duration {
			ang := d.in(-math.Pi, math.Pi)
			q := clampIn(p[0]+1.2*math.Cos(ang), p[1]+1.2*math.Sin(ang))
			t += math.Max(1, math.Hypot(q[0]-p[0], q[1]-p[1])/speed)
			p = q
			in.Path = append(in.Path, Waypoint{T: t, X: p[0], Y: p[1]})
		}
	}
	switch behaviour {
	case 1:
		in.Lying = true
	case 2:
		in.Lying = d.chance(0.7)
		floor := w.Site.Depth.At(p[0])
		in.Depth = math.Min(d.in(0.3, 1.2), floor-0.3)
		in.Contrast = d.in(0.2, 0.5)
		in.SinkAt = enter + d.in(1, 4)
		in.SinkDur = d.in(2, 5)
	}
	for i := range in.Path {
		in.Path[i].T = math.Round(in.Path[i].T*1000) / 1000
		in.Path[i].X = math.Round(in.Path[i].X*1000) / 1000
		in.Path[i].Y = math.Round(in.Path[i].Y*1000) / 1000
	}
	return in
}
