package synth

import (
	"context"
	"encoding/json"
	"fmt"
	"image"
	"image/color"
	"math"
	"math/rand"
	"os"
	"path/filepath"

	"gocv.io/x/gocv"
)

// Corner is one pool corner: its name, pool metres and camera pixels.
type Corner struct {
	Name  string     `json:"name"`
	Pool  [2]float64 `json:"pool_m"`
	Pixel [2]float64 `json:"pixel"`
}

// Presence is an interval of media time during which an intruder is in the
// water, seconds from the first frame; To is exclusive.
type Presence struct {
	From float64 `json:"from_s"`
	To   float64 `json:"to_s"`
}

// FrameTruth is the ground truth of one frame. Intruder is nil when the
// pool is empty.
type FrameTruth struct {
	Frame    int         `json:"frame"`
	T        float64     `json:"t_s"`
	Intruder *Occupation `json:"intruder"`
	// Outside is a family child who is in the picture but not in the
	// water (walking to the edge); nil otherwise.
	Outside *Occupation `json:"outside,omitempty"`
	// Fault is the camera fault of this frame (black, frozen, noise), if
	// any.
	Fault string `json:"fault,omitempty"`
}

// Occupation is where an intruder is: the centre of its visible outline in
// pool metres on the water surface, and that outline's area. For an
// intruder below the surface, X and Y are where the camera sees it (the
// refracted, apparent position) and Under says where it really is.
type Occupation struct {
	X     float64    `json:"x_m"`
	Y     float64    `json:"y_m"`
	Area  float64    `json:"area_m2"`
	Under *Submerged `json:"submerged,omitempty"`
}

// Submerged is the true position of an intruder below the water surface:
// the centre of its outline in pool metres and its depth in metres.
type Submerged struct {
	X     float64 `json:"x_m"`
	Y     float64 `json:"y_m"`
	Depth float64 `json:"depth_m"`
}

// Truth is the label file written beside a clip. Hand-written labels for a
// real clip need only Format, FPS, Presence (and optionally Frames with
// positions); the generator fills in the rest.
type Truth struct {
	Format   string       `json:"format"`
	Clip     string       `json:"clip"`
	FPS      float64      `json:"fps"`
	Width    int          `json:"width"`
	Height   int          `json:"height"`
	Frames   int          `json:"frames"`
	Pool     PoolSize     `json:"pool"`
	Corners  []Corner     `json:"corners"`
	Camera   *Pose        `json:"camera,omitempty"`
	Presence []Presence   `json:"presence"`
	PerFrame []FrameTruth `json:"per_frame,omitempty"`

	// Family scenes add what an installer knows beyond the corners (the
	// chessboard lens, the pool's depth and the deck's height above the
	// water) and the scene's faults and events. Corner pixels are on the
	// raw (distorted) frame.
	Seed       int64         `json:"seed,omitempty"`
	Variant    string        `json:"variant,omitempty"`
	Renderer   string        `json:"renderer,omitempty"`
	Lens       *Lens         `json:"lens,omitempty"`
	Depth      *DepthProfile `json:"depth,omitempty"`
	DeckHeight float64       `json:"deck_height_m,omitempty"`
	Night      bool          `json:"night,omitempty"`
	Faults     []Fault       `json:"faults,omitempty"`
	Events     []Event       `json:"events,omitempty"`
}

// PoolSize is the rectangle the pool frame is built on, metres.
type PoolSize struct {
	Length float64 `json:"length_m"`
	Width  float64 `json:"width_m"`
}

// LabelFormat names the label file format and its version.
const LabelFormat = "stillwater.labels/v1"

// ReadTruth loads a label file.
func ReadTruth(path string) (Truth, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return Truth{}, fmt.Errorf("read labels: %w", err)
	}
	var t Truth
	if err := json.Unmarshal(b, &t); err != nil {
		return Truth{}, fmt.Errorf("read labels %s: %w", path, err)
	}
	if t.Format != LabelFormat {
		return Truth{}, fmt.Errorf("read labels %s: format %q, want %q", path, t.Format, LabelFormat)
	}
	if t.FPS <= 0 {
		return Truth{}, fmt.Errorf("read labels %s: fps %g must be positive", path, t.FPS)
	}
	for i, p := range t.Presence {
		if p.To <= p.From {
			return Truth{}, fmt.Errorf("read labels %s: presence[%d] ends (%g s) before it starts (%g s)", path, i, p.To, p.From)
		}
	}
	return t, nil
}

// Render draws the scene into videoPath and writes the labels as JSON to
// truthPath (none when empty). It returns the labels. Named scenes are
// written with OpenCV's video writer (an AVI container); family scenes
// through ffmpeg in the container VideoExt names.
func Render(ctx context.Context, s Scene, videoPath, truthPath string) (Truth, error) {
	if err := s.Validate(); err != nil {
		return Truth{}, fmt.Errorf("render: %w", err)
	}
	if s.frameCount() == 0 {
		return Truth{}, errNoFrames
	}
	var truth Truth
	var err error
	if s.World != nil {
		truth, err = renderWorld(ctx, s, videoPath)
	} else {
		truth, err = renderTop(ctx, s, videoPath)
	}
	if err != nil {
		return Truth{}, err
	}
	if truthPath != "" {
		if err := writeTruth(truthPath, truth); err != nil {
			return Truth{}, err
		}
	}
	return truth, nil
}

// writeTruth writes labels as indented JSON.
func writeTruth(path string, t Truth) error {
	b, err := json.MarshalIndent(t, "", " ")
	if err != nil {
		return fmt.Errorf("write labels %s: %w", path, err)
	}
	if err := os.WriteFile(path, append(b, '\n'), 0o644); err != nil {
		return fmt.Errorf("write labels: %w", err)
	}
	return nil
}

// renderTop draws a named scene with the top-down renderer.
func renderTop(ctx context.Context, s Scene, videoPath string) (Truth, error) {
	n := s.frameCount()
	codec := s.Codec
	if codec == "" {
		codec = "MJPG"
	}
	w, err := gocv.VideoWriterFile(videoPath, codec, s.FPS, s.Width, s.Height, true)
	if err != nil {
		return Truth{}, fmt.Errorf("render: open writer %s: %w", videoPath, err)
	}
	defer w.Close()
	if !w.IsOpened() {
		return Truth{}, fmt.Errorf("render: video writer for %s with codec %s did not open", videoPath, codec)
	}
	r := newRenderer(s)
	defer r.Close()

	truth := r.labels(filepath.Base(videoPath))
	for i := 0; i < n; i++ {
		if err := ctx.Err(); err != nil {
			return Truth{}, err
		}
		ft := r.frame(i)
		truth.PerFrame = append(truth.PerFrame, ft)
		if err := w.Write(r.cam); err != nil {
			return Truth{}, fmt.Errorf("render: write frame %d: %w", i, err)
		}
	}
	truth.Presence = presenceFrom(truth.PerFrame, s.FPS)
	return truth, nil
}

func presenceFrom(fs []FrameTruth, fps float64) []Presence {
	var out []Presence
	in := false
	for _, f := range fs {
		switch {
		case f.Intruder != nil && !in:
			out = append(out, Presence{From: f.T})
			in = true
		case f.Intruder == nil && in:
			out[len(out)-1].To = f.T
			in = false
		}
	}
	if in {
		out[len(out)-1].To = float64(len(fs)) / fps
	}
	return out
}

// renderer holds the scene's buffers; Close frees its Mats.
type renderer struct {
	s     Scene
	rng   *rand.Rand
	top   image.Point
	base  []float32 // static BGR layer, top-down
	pool  []bool    // top-down pixel is water
	buf   []byte    // top-down frame
	cams  []camera
	topM  gocv.Mat
	cam   gocv.Mat
	warp  gocv.Mat
	noise []float32

	glints []glint
	leaves []leaf
	stamp  []uint32 // per top-down pixel: last intruder generation that covered it
	gen    uint32

	// Water tables: the waves, their sin and cos along u (fixed) and
	// along v (refilled each frame), and the plane-to-camera transforms.
	wv     []wave
	su, sv [][2][]float32
	xforms []gocv.Mat
	gray   gocv.Mat
}

type glint struct {
	x, y float64 // top-down px
	r    float64
	life int
}

type leaf struct {
	x, y, vx, vy, a, b, ang float64
	c                       [3]float32
}

func newRenderer(s Scene) *renderer {
	r := &renderer{s: s, rng: rand.New(rand.NewSource(s.Seed)), top: s.topSize()}
	n := r.top.X * r.top.Y
	r.base = make([]float32, 3*n)
	r.pool = make([]bool, n)
	r.buf = make([]byte, 3*n)
	r.stamp = make([]uint32, n)
	r.drawBase()
	r.wv = r.waves()
	for _, w := range r.wv {
		su := [2][]float32{make([]float32, r.top.X), make([]float32, r.top.X)}
		for u := 0; u < r.top.X; u++ {
			su[0][u] = float32(math.Sin(w.kx * float64(u)))
			su[1][u] = float32(math.Cos(w.kx * float64(u)))
		}
		r.su = append(r.su, su)
		r.sv = append(r.sv, [2][]float32{make([]float32, r.top.Y), make([]float32, r.top.Y)})
	}
	r.gray = gocv.NewMat()
	r.topM = gocv.NewMatWithSize(r.top.Y, r.top.X, gocv.MatTypeCV8UC3)
	r.cam = gocv.NewMat()
	r.warp = gocv.NewMat()
	r.cams = []camera{newCamera(s.Camera, s.Width, s.Height)}
	if s.PanDeg != 0 {
		p := s.Camera
		p.YawDeg += s.PanDeg
		r.cams = append(r.cams, newCamera(p, s.Width, s.Height))
	}
	for _, c := range r.cams {
		r.xforms = append(r.xforms, r.planeXform(c))
	}
	r.noise = make([]float32, 1<<20)
	for i := range r.noise {
		r.noise[i] = float32(r.rng.NormFloat64())
	}
	for i := 0; i < s.Leaves; i++ {
		r.leaves = append(r.leaves, leaf{
			x: r.rng.Float64() * s.PoolLength, y: r.rng.Float64() * s.PoolWidth,
			vx: (r.rng.Float64() - 0.5) * 0.05, vy: (r.rng.Float64() - 0.5) * 0.05,
			a: 0.03 + 0.02*r.rng.Float64(), b: 0.015 + 0.01*r.rng.Float64(), ang: r.rng.Float64() * math.Pi,
			c: [3]float32{30, float32(70 + r.rng.Intn(40)), float32(60 + r.rng.Intn(60))},
		})
	}
	return r
}

func (r *renderer) Close() {
	r.topM.Close()
	r.cam.Close()
	r.warp.Close()
	r.gray.Close()
	for _, m := range r.xforms {
		m.Close()
	}
}

func (r *renderer) toTop(x, y float64) (float64, float64) {
	m := r.s.margin()
	return (x + m) * r.s.PPM, (y + m) * r.s.PPM
}

func (r *renderer) toPool(u, v float64) (float64, float64) {
	m := r.s.margin()
	return u/r.s.PPM - m, v/r.s.PPM - m
}

// drawBase paints the static layer: deck, coping, and the pool floor with
// its lane lines as seen through clear water.
func (r *renderer) drawBase() {
	s := r.s
	const coping = 0.3
	for v := 0; v < r.top.Y; v++ {
		for u := 0; u < r.top.X; u++ {
			x, y := r.toPool(float64(u), float64(v))
			i := v*r.top.X + u
			var c [3]float32
			switch {
			case x >= 0 && x < s.PoolLength && y >= 0 && y < s.PoolWidth:
				r.pool[i] = true
				c = [3]float32{185, 160, 70} // turquoise water over a pale floor (BGR)
				// Lane lines on the floor every metre across the width.
				for k := 1.0; k < s.PoolWidth; k++ {
					if math.Abs(y-k) < 0.06 && x > 0.8 && x < s.PoolLength-0.8 {
						c = [3]float32{120, 70, 30}
					}
				}
			case x >= -coping && x < s.PoolLength+coping && y >= -coping && y < s.PoolWidth+coping:
				c = [3]float32{215, 220, 225} // coping stones
			default:
				// Deck pavers: a grid of 0.6 m slabs with grain.
				g := float32(r.rng.Intn(14))
				c = [3]float32{140 + g, 155 + g, 170 + g}
				if math.Mod(x+10, 0.6) < 0.02 || math.Mod(y+10, 0.6) < 0.02 {
					c = [3]float32{110, 120, 130}
				}
			}
			copy(r.base[3*i:3*i+3], c[:])
		}
	}
}

// wave is one travelling sinusoid k·p − ωt, separable in u and v.
type wave struct {
	kx, ky, w, amp float64
}

func (r *renderer) waves() []wave {
	a := r.s.Ripple
	return []wave{
		{kx: 0.045, ky: 0.021, w: 2.1, amp: 10 * a},
		{kx: -0.019, ky: 0.052, w: 2.9, amp: 8 * a},
		{kx: 0.071, ky: -0.033, w: 3.7, amp: 5 * a},
		{kx: 0.012, ky: 0.09, w: 1.3, amp: 4 * a},
	}
}

// frame renders frame i into r.cam and returns its truth.
func (r *renderer) frame(i int) FrameTruth {
	s := r.s
	t := float64(i) / s.FPS
	ft := FrameTruth{Frame: i, T: round6(t)}

	light := 1.0
	if c := s.Cloud; c != nil {
		light -= c.Depth * cloudProfile(t, *c)
	}
	if s.Night {
		light *= 0.35
	}

	r.paintWater(t, light)
	r.paintLeaves(t)
	r.paintGlints(light)
	occ := r.paintIntruders(t, light)
	r.paintBird(t, light)
	r.paintWalker(t, light)
	if occ != nil {
		ft.Intruder = occ
	}

	cam := 0
	if len(r.cams) > 1 && t >= s.PanAt {
		cam = 1
	}
	r.toCamera(cam, light)
	return ft
}

func cloudProfile(t float64, c Cloud) float64 {
	switch {
	case t < c.Start:
		return 0
	case t < c.Start+c.Ramp:
		return smooth((t - c.Start) / c.Ramp)
	case t < c.Start+c.Ramp+c.Hold:
		return 1
	case t < c.Start+2*c.Ramp+c.Hold:
		return 1 - smooth((t-c.Start-c.Ramp-c.Hold)/c.Ramp)
	}
	return 0
}

func smooth(a float64) float64 { return a * a * (3 - 2*a) }

func (r *renderer) paintWater(t, light float64) {
	ws := r.wv
	W, H := r.top.X, r.top.Y
	// sin(kx·u + ky·v − ωt) = sin(kx·u)cos(ky·v − ωt) + cos(kx·u)sin(ky·v − ωt):
	// the u factors are the renderer's tables, the v factors are refilled
	// for t.
	su, sv := r.su, r.sv
	for k, w := range ws {
		for v := 0; v < H; v++ {
			a := w.ky*float64(v) - w.w*t
			sv[k][0][v] = float32(math.Cos(a))
			sv[k][1][v] = float32(math.Sin(a))
		}
	}
	lf := float32(light)
	caust := float32(18 * r.s.Ripple)
	for v := 0; v < H; v++ {
		row := v * W
		for u := 0; u < W; u++ {
			i := row + u
			b := r.base[3*i : 3*i+3]
			if !r.pool[i] {
				r.buf[3*i] = clamp(b[0] * lf)
				r.buf[3*i+1] = clamp(b[1] * lf)
				r.buf[3*i+2] = clamp(b[2] * lf)
				continue
			}
			var sum, c float32
			for k := range ws {
				s := su[k][0][u]*sv[k][0][v] + su[k][1][u]*sv[k][1][v]
				sum += float32(ws[k].amp) * s
				c += s
			}
			// Caustics: bright ridges where the waves add up.
			if c > 1.6 {
				sum += caust * (c - 1.6) * (c - 1.6) * 2
			}
			r.buf[3*i] = clamp((b[0] + sum) * lf)
			r.buf[3*i+1] = clamp((b[1] + sum) * lf)
			r.buf[3*i+2] = clamp((b[2] + 0.6*sum) * lf)
		}
	}
	if r.s.Night {
		r.paintPoolLights()
	}
}

// paintPoolLights adds two underwater lamps on the long wall.
func (r *renderer) paintPoolLights() {
	for _, lx := range []float64{r.s.PoolLength * 0.3, r.s.PoolLength * 0.7} {
		cu, cv := r.toTop(lx, 0.1)
		rad := 1.2 * r.s.PPM
		r.forDisc(cu, cv, rad, func(i int, d2 float64) {
			if !r.pool[i] {
				return
			}
			g := float32(90 * math.Exp(-d2/(rad*rad/4)))
			for c := 0; c < 3; c++ {
				r.buf[3*i+c] = clamp(float32(r.buf[3*i+c]) + g)
			}
		})
	}
}

func (r *renderer) forDisc(cu, cv, rad float64, fn func(i int, d2 float64)) {
	u0, u1 := int(math.Max(0, cu-rad)), int(math.Min(float64(r.top.X-1), cu+rad))
	v0, v1 := int(math.Max(0, cv-rad)), int(math.Min(float64(r.top.Y-1), cv+rad))
	for v := v0; v <= v1; v++ {
		for u := u0; u <= u1; u++ {
			du, dv := float64(u)-cu, float64(v)-cv
			d2 := du*du + dv*dv
			if d2 <= rad*rad {
				fn(v*r.top.X+u, d2)
			}
		}
	}
}

// forEllipse calls fn for every top-down pixel inside an ellipse with
// semi-axes a, b (px) rotated by ang.
func (r *renderer) forEllipse(cu, cv, a, b, ang float64, fn func(i int)) {
	rad := math.Max(a, b)
	ca, sa := math.Cos(ang), math.Sin(ang)
	r.forDisc(cu, cv, rad, func(i int, _ float64) {
		u := float64(i%r.top.X) - cu
		v := float64(i/r.top.X) - cv
		x := u*ca + v*sa
		y := -u*sa + v*ca
		if x*x/(a*a)+y*y/(b*b) <= 1 {
			fn(i)
		}
	})
}

func (r *renderer) blend(i int, c [3]float32, alpha, light float64) {
	for k := 0; k < 3; k++ {
		cur := float64(r.buf[3*i+k])
		r.buf[3*i+k] = clamp(float32(cur*(1-alpha) + float64(c[k])*light*alpha))
	}
}

func (r *renderer) paintGlints(light float64) {
	if r.s.Glints <= 0 {
		return
	}
	// Poisson-ish arrivals: Glints new ones per frame on average.
	n := int(r.s.Glints)
	if r.rng.Float64() < r.s.Glints-float64(n) {
		n++
	}
	for k := 0; k < n; k++ {
		x := r.rng.Float64() * r.s.PoolLength
		y := r.rng.Float64() * r.s.PoolWidth
		u, v := r.toTop(x, y)
		r.glints = append(r.glints, glint{x: u, y: v, r: (0.02 + 0.04*r.rng.Float64()) * r.s.PPM, life: 1 + r.rng.Intn(3)})
	}
	keep := r.glints[:0]
	for _, g := range r.glints {
		r.forDisc(g.x, g.y, g.r, func(i int, _ float64) {
			if r.pool[i] {
				v := clamp(float32(255 * math.Min(1, light*1.6)))
				r.buf[3*i], r.buf[3*i+1], r.buf[3*i+2] = v, v, v
			}
		})
		g.life--
		if g.life > 0 {
			keep = append(keep, g)
		}
	}
	r.glints = keep
}

func (r *renderer) paintLeaves(t float64) {
	dt := 1 / r.s.FPS
	for k := range r.leaves {
		l := &r.leaves[k]
		l.x = math.Mod(l.x+l.vx*dt+r.s.PoolLength, r.s.PoolLength)
		l.y = math.Mod(l.y+l.vy*dt+r.s.PoolWidth, r.s.PoolWidth)
		u, v := r.toTop(l.x, l.y)
		r.forEllipse(u, v, l.a*r.s.PPM, l.b*r.s.PPM, l.ang+0.2*math.Sin(t), func(i int) {
			if r.pool[i] {
				r.blend(i, l.c, 0.9, 1)
			}
		})
	}
}

// paintIntruders draws each child present at t and returns the truth of the
// first one: the centroid and area of the pixels it covers.
func (r *renderer) paintIntruders(t, light float64) *Occupation {
	var out *Occupation
	for _, in := range r.s.Intruders {
		x, y, ok := in.position(t)
		if !ok {
			continue
		}
		sz := SizeForAge(in.AgeMonths)
		// Heading follows the path; a small bob keeps it alive.
		ang := r.heading(in, t)
		x += 0.02 * math.Sin(2*math.Pi*0.7*t)
		alpha := in.Contrast
		if alpha == 0 {
			alpha = 1
		}
		hair := [3]float32{35, 45, 60}
		suit := [3]float32{50, 40, 190}
		skin := [3]float32{120, 150, 200}
		var cnt, su, sv float64
		r.gen++
		mark := func(i int) {
			if !r.pool[i] || r.stamp[i] == r.gen {
				return
			}
			r.stamp[i] = r.gen
			cnt++
			su += float64(i % r.top.X)
			sv += float64(i / r.top.X)
		}
		ppm := r.s.PPM
		// Below the surface the child is drawn where its sight line
		// enters the water; the shift is undone in the labels.
		ax, ay := x, y
		if in.Depth > 0 {
			var err error
			if ax, ay, err = r.s.Apparent(x, y, in.Depth); err != nil {
				ax, ay = x, y
			}
		}
		cu, cv := r.toTop(ax, ay)
		ca, sa := math.Cos(ang), math.Sin(ang)
		if in.Lying {
			// Face-down float: torso and limbs along the heading.
			r.forEllipse(cu, cv, sz.LengthM*0.33*ppm, sz.ShoulderM*0.5*ppm, ang, func(i int) { mark(i); r.blend(i, suit, alpha, light) })
			hu, hv := cu+ca*sz.LengthM*0.38*ppm, cv+sa*sz.LengthM*0.38*ppm
			r.forDisc(hu, hv, sz.HeadDiameterM/2*ppm, func(i int, _ float64) { mark(i); r.blend(i, hair, alpha, light) })
		} else {
			// Upright: shoulders across the heading and the head on top.
			r.forEllipse(cu, cv, sz.ShoulderM/2*ppm, sz.ShoulderM*0.25*ppm, ang+math.Pi/2, func(i int) { mark(i); r.blend(i, skin, alpha, light) })
			r.forDisc(cu, cv, sz.HeadDiameterM/2*ppm, func(i int, _ float64) { mark(i); r.blend(i, hair, alpha, light) })
		}
		if out == nil && cnt > 0 {
			px, py := r.toPool(su/cnt, sv/cnt)
			out = &Occupation{X: round6(px), Y: round6(py), Area: round6(cnt / (ppm * ppm))}
			if in.Depth > 0 {
				out.Under = &Submerged{X: round6(px + x - ax), Y: round6(py + y - ay), Depth: in.Depth}
			}
		}
	}
	return out
}

func (r *renderer) heading(in Child, t float64) float64 {
	x0, y0, _ := in.position(t - 0.5)
	x1, y1, _ := in.position(t + 0.5)
	if math.Hypot(x1-x0, y1-y0) < 1e-3 {
		return 0.3
	}
	return math.Atan2(y1-y0, x1-x0)
}

// paintBird: a small dark bird glides in from beyond the far end, lands on
// the coping for Stay seconds and leaves.
func (r *renderer) paintBird(t, light float64) {
	b := r.s.Bird
	if b == nil {
		return
	}
	const fly = 2.0
	var x, y float64
	switch {
	case t < b.Start || t > b.Start+2*fly+b.Stay:
		return
	case t < b.Start+fly:
		a := (t - b.Start) / fly
		x, y = b.X+(1-a)*6, b.Y-(1-a)*3
	case t < b.Start+fly+b.Stay:
		x, y = b.X, b.Y
	default:
		a := (t - b.Start - fly - b.Stay) / fly
		x, y = b.X-a*6, b.Y+a*3
	}
	u, v := r.toTop(x, y)
	r.forEllipse(u, v, 0.14*r.s.PPM, 0.06*r.s.PPM, 0.5, func(i int) { r.blend(i, [3]float32{40, 40, 45}, 1, light) })
}

// paintWalker: an adult walks along the deck beside the long side.
func (r *renderer) paintWalker(t, light float64) {
	if !r.s.DeckWalker {
		return
	}
	x := -1 + math.Mod(t*0.9, r.s.PoolLength+2)
	y := -0.9
	u, v := r.toTop(x, y)
	r.forEllipse(u, v, 0.16*r.s.PPM, 0.25*r.s.PPM, 0, func(i int) { r.blend(i, [3]float32{60, 50, 40}, 1, light) })
	r.forDisc(u, v, 0.1*r.s.PPM, func(i int, _ float64) { r.blend(i, [3]float32{30, 35, 40}, 1, light) })
}

// planeXform returns the transform from top-down pixels to camera pixels:
// top-down px → pool metres → image, M = P · S⁻¹ with S = scale+shift.
// The caller closes it.
func (r *renderer) planeXform(c camera) gocv.Mat {
	s := r.s
	p := c.planeToImage()
	m := s.margin()
	inv := [9]float64{1 / s.PPM, 0, -m, 0, 1 / s.PPM, -m, 0, 0, 1}
	var M [9]float64
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			for k := 0; k < 3; k++ {
				M[3*i+j] += p[3*i+k] * inv[3*k+j]
			}
		}
	}
	mat := gocv.NewMatWithSize(3, 3, gocv.MatTypeCV64F)
	for i := 0; i < 9; i++ {
		mat.SetDoubleAt(i/3, i%3, M[i])
	}
	return mat
}

// toCamera warps the top-down frame into the view of camera k, paints the
// sky above the horizon and adds sensor noise.
func (r *renderer) toCamera(k int, light float64) {
	s := r.s
	c := r.cams[k]
	mat := r.xforms[k]
	copy(mustBytes(r.topM), r.buf)
	g := float64(clamp(float32(150 * light)))
	gocv.WarpPerspectiveWithParams(r.topM, &r.warp, mat, image.Pt(s.Width, s.Height), gocv.InterpolationLinear, gocv.BorderConstant, color.RGBA{uint8(g - 10), uint8(g), uint8(g + 10), 0})
	if hz := c.horizonRow(s.Camera); hz > 0 {
		sky := float64(clamp(float32(230 * light)))
		gocv.Rectangle(&r.warp, image.Rect(0, 0, s.Width, hz), color.RGBA{uint8(sky * 0.8), uint8(sky * 0.9), uint8(sky), 0}, -1)
	}
	if s.Night {
		gocv.CvtColor(r.warp, &r.gray, gocv.ColorBGRToGray)
		gocv.CvtColor(r.gray, &r.warp, gocv.ColorGrayToBGR)
	}
	r.warp.CopyTo(&r.cam)
	sigma := s.Noise
	if s.Night {
		sigma *= 2.5
	}
	if sigma > 0 {
		b := mustBytes(r.cam)
		off := r.rng.Intn(len(r.noise))
		nn := len(r.noise)
		for i := range b {
			b[i] = clamp(float32(b[i]) + float32(sigma)*r.noise[(off+i*7)%nn])
		}
	}
}

// mustBytes returns the Mat's pixel bytes; the Mats here are continuous
// 8-bit images made by this package, so the call cannot fail.
func mustBytes(m gocv.Mat) []byte {
	b, err := m.DataPtrUint8()
	if err != nil {
		panic(fmt.Sprintf("synth: mat data: %v", err))
	}
	return b
}

func clamp(v float32) uint8 {
	if v < 0 {
		return 0
	}
	if v > 255 {
		return 255
	}
	return uint8(v + 0.5)
}

func round6(v float64) float64 { return math.Round(v*1e6) / 1e6 }

// labels starts the truth file: size, pool and the projected corners.
func (r *renderer) labels(clip string) Truth {
	s := r.s
	c := r.cams[0]
	t := Truth{
		Format: LabelFormat, Clip: clip, FPS: s.FPS, Width: s.Width, Height: s.Height,
		Frames: s.frameCount(), Pool: PoolSize{s.PoolLength, s.PoolWidth},
	}
	pose := s.Camera
	t.Camera = &pose
	for _, k := range []struct {
		name string
		x, y float64
	}{{"A", 0, 0}, {"B", s.PoolLength, 0}, {"C", s.PoolLength, s.PoolWidth}, {"D", 0, s.PoolWidth}} {
		u, v, _ := c.project(k.x, k.y, 0)
		t.Corners = append(t.Corners, Corner{Name: k.name, Pool: [2]float64{k.x, k.y}, Pixel: [2]float64{round6(u), round6(v)}})
	}
	return t
}
