package synth

import (
	"image"
	"math"
)

// prim is one shape of a body: an ellipsoid, or (flat) an ellipse lying on
// the plane z = c[2].
type prim struct {
	flat bool
	c    [3]float64
	inv  [3][3]float64 // world offset → unit sphere (flat: rows 0, 1 → unit disc)
	ext  [3]float64    // half-extent of the bounding box per world axis
	col  [3]float32    // albedo, B G R
	box  image.Rectangle
}

// object is a group of prims drawn together: one body, bird or leaf.
type object struct {
	from, to int // prims[from:to]
	// under is the blend weight of the parts below the water surface
	// (Contrast for a submerged child); 0 means physical (fading with
	// depth).
	under  float64
	shadow bool // casts a sun shadow
	box    image.Rectangle
	dist   float64 // from the camera, for drawing order
	sun    float64 // sunlit fraction at the object
}

// objScratch holds a frame's objects; it is reused from frame to frame.
type objScratch struct {
	prims []prim
	objs  []object
	order []int
}

// rot is a rotation, columns are the images of the body's x, y, z axes.
type rot [3][3]float64

func rotZ(a float64) rot {
	c, s := math.Cos(a), math.Sin(a)
	return rot{{c, -s, 0}, {s, c, 0}, {0, 0, 1}}
}

func rotX(a float64) rot {
	c, s := math.Cos(a), math.Sin(a)
	return rot{{1, 0, 0}, {0, c, -s}, {0, s, c}}
}

func rotY(a float64) rot {
	c, s := math.Cos(a), math.Sin(a)
	return rot{{c, 0, s}, {0, 1, 0}, {-s, 0, c}}
}

func (a rot) mul(b rot) rot {
	var m rot
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			m[i][j] = a[i][0]*b[0][j] + a[i][1]*b[1][j] + a[i][2]*b[2][j]
		}
	}
	return m
}

func (a rot) apply(v [3]float64) [3]float64 {
	return [3]float64{a[0][0]*v[0] + a[0][1]*v[1] + a[0][2]*v[2], a[1][0]*v[0] + a[1][1]*v[1] + a[1][2]*v[2], a[2][0]*v[0] + a[2][1]*v[1] + a[2][2]*v[2]}
}

// pose places a body frame in the world: world = R·p + T.
type pose struct {
	R rot
	T [3]float64
}

func (p pose) at(v [3]float64) [3]float64 {
	q := p.R.apply(v)
	return [3]float64{q[0] + p.T[0], q[1] + p.T[1], q[2] + p.T[2]}
}

// ellipsoid adds an ellipsoid with semi-axes ax along local (part) axes
// turned by local, centred at body point c, in body pose p.
func (sc *objScratch) ellipsoid(p pose, c [3]float64, local rot, ax [3]float64, col RGB) {
	R := p.R.mul(local)
	var M rot // world = M·unit + centre
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			M[i][j] = R[i][j] * ax[j]
		}
	}
	pr := prim{c: p.at(c)}
	for i := 0; i < 3; i++ {
		pr.ext[i] = math.Sqrt(M[i][0]*M[i][0] + M[i][1]*M[i][1] + M[i][2]*M[i][2])
		for j := 0; j < 3; j++ {
			pr.inv[i][j] = R[j][i] / ax[i] // diag(1/ax)·Rᵀ
		}
	}
	pr.col = [3]float32{float32(col[0]), float32(col[1]), float32(col[2])}
	sc.prims = append(sc.prims, pr)
}

// flatEllipse adds an ellipse lying at height z, semi-axes a (along angle
// ang) and b.
func (sc *objScratch) flatEllipse(x, y, z, a, b, ang float64, col RGB) {
	ca, sa := math.Cos(ang), math.Sin(ang)
	pr := prim{flat: true, c: [3]float64{x, y, z}}
	pr.inv[0] = [3]float64{ca / a, sa / a, 0}
	pr.inv[1] = [3]float64{-sa / b, ca / b, 0}
	r := math.Max(a, b)
	pr.ext = [3]float64{r, r, 0.001}
	pr.col = [3]float32{float32(col[0]), float32(col[1]), float32(col[2])}
	sc.prims = append(sc.prims, pr)
}

// hitPrim returns the ray parameter of the first hit of o + t·d (t > 0)
// and the outward normal there.
func hitPrim(p *prim, o, d [3]float64) (float64, [3]float64, bool) {
	q := [3]float64{o[0] - p.c[0], o[1] - p.c[1], o[2] - p.c[2]}
	if p.flat {
		if math.Abs(d[2]) < 1e-9 {
			return 0, [3]float64{}, false
		}
		t := -q[2] / d[2]
		if t <= 0 {
			return 0, [3]float64{}, false
		}
		x, y := q[0]+t*d[0], q[1]+t*d[1]
		u := p.inv[0][0]*x + p.inv[0][1]*y
		v := p.inv[1][0]*x + p.inv[1][1]*y
		if u*u+v*v > 1 {
			return 0, [3]float64{}, false
		}
		return t, [3]float64{0, 0, 1}, true
	}
	var oq, dq [3]float64
	for i := 0; i < 3; i++ {
		oq[i] = p.inv[i][0]*q[0] + p.inv[i][1]*q[1] + p.inv[i][2]*q[2]
		dq[i] = p.inv[i][0]*d[0] + p.inv[i][1]*d[1] + p.inv[i][2]*d[2]
	}
	a := dq[0]*dq[0] + dq[1]*dq[1] + dq[2]*dq[2]
	b := oq[0]*dq[0] + oq[1]*dq[1] + oq[2]*dq[2]
	c := oq[0]*oq[0] + oq[1]*oq[1] + oq[2]*oq[2] - 1
	disc := b*b - a*c
	if disc < 0 {
		return 0, [3]float64{}, false
	}
	t := (-b - math.Sqrt(disc)) / a
	if t <= 1e-6 {
		return 0, [3]float64{}, false
	}
	// Normal: invᵀ·(unit-sphere point).
	var u [3]float64
	for i := 0; i < 3; i++ {
		u[i] = oq[i] + t*dq[i]
	}
	var n [3]float64
	for j := 0; j < 3; j++ {
		n[j] = p.inv[0][j]*u[0] + p.inv[1][j]*u[1] + p.inv[2][j]*u[2]
	}
	l := math.Sqrt(n[0]*n[0] + n[1]*n[1] + n[2]*n[2])
	return t, [3]float64{n[0] / l, n[1] / l, n[2] / l}, true
}

// footprint returns the top-down outline of prims[from:to] on a 2 cm grid:
// its centroid (pool metres) and its area inside the water rectangle, m².
func (sc *objScratch) footprint(from, to int, L, W float64) (cx, cy, area float64, ok bool) {
	x0, y0, x1, y1 := math.Inf(1), math.Inf(1), math.Inf(-1), math.Inf(-1)
	for k := from; k < to; k++ {
		p := &sc.prims[k]
		x0, x1 = math.Min(x0, p.c[0]-p.ext[0]), math.Max(x1, p.c[0]+p.ext[0])
		y0, y1 = math.Min(y0, p.c[1]-p.ext[1]), math.Max(y1, p.c[1]+p.ext[1])
	}
	const step = 0.02
	var n, nIn, sx, sy float64
	for y := y0 + step/2; y < y1; y += step {
		for x := x0 + step/2; x < x1; x += step {
			for k := from; k < to; k++ {
				if _, _, hit := hitPrim(&sc.prims[k], [3]float64{x, y, -20}, [3]float64{0, 0, 1}); hit {
					n++
					sx += x
					sy += y
					if x >= 0 && x <= L && y >= 0 && y <= W {
						nIn++
					}
					break
				}
			}
		}
	}
	if n == 0 {
		return 0, 0, 0, false
	}
	return sx / n, sy / n, nIn * step * step, true
}

// childState is where a family child is and how it lies at one time.
type childState struct {
	present  bool
	x, y     float64 // body centre, pool metres
	inWater  bool
	depth    float64 // of the body centre below the surface (0 at the surface)
	contrast float64
}

// childEntry returns the first media time the child's path is inside the
// pool rectangle (or +Inf).
func childEntry(in Child, L, W float64) float64 {
	if len(in.Path) == 0 {
		return math.Inf(1)
	}
	end := in.Path[len(in.Path)-1].T
	for t := in.Path[0].T; t <= end+0.05; t += 0.02 {
		x, y, ok := in.position(t)
		if ok && x >= 0 && x <= L && y >= 0 && y <= W {
			return t
		}
	}
	return math.Inf(1)
}

// heading returns the direction of travel, radians, keeping the last one
// while the child is still.
func childHeading(in Child, t float64) float64 {
	x0, y0, _ := in.position(t - 0.6)
	x1, y1, _ := in.position(t + 0.6)
	if math.Hypot(x1-x0, y1-y0) > 0.02 {
		return math.Atan2(y1-y0, x1-x0)
	}
	for k := len(in.Path) - 1; k > 0; k-- {
		if in.Path[k].T > t {
			continue
		}
		a, b := in.Path[k-1], in.Path[k]
		if math.Hypot(b.X-a.X, b.Y-a.Y) > 0.02 {
			return math.Atan2(b.Y-a.Y, b.X-a.X)
		}
	}
	if len(in.Path) > 1 {
		a, b := in.Path[0], in.Path[1]
		return math.Atan2(b.Y-a.Y, b.X-a.X)
	}
	return 0.3
}

// addChild builds a child's body at time t (one object) and returns its
// state.
func (r *wRenderer) addChild(in Child, entry, t float64) childState {
	x, y, present := in.position(t)
	if !present {
		return childState{}
	}
	st := childState{present: true, x: x, y: y, contrast: 1}
	L, W := r.s.PoolLength, r.s.PoolWidth
	inside := x >= 0 && x <= L && y >= 0 && y <= W
	look := ChildLook{Skin: RGB{0.3, 0.4, 0.6}, Hair: RGB{0.04, 0.07, 0.12}, Suit: RGB{0.1, 0.1, 0.7}, Legs: RGB{0.1, 0.1, 0.7}, Scale: 1}
	if in.Look != nil {
		look = *in.Look
	}
	body := BodyForAge(float64(in.AgeMonths), look.Girl)
	H := body.HeightM * look.Scale
	hd := body.HeadM * look.Scale
	sb := body.ShoulderM * look.Scale
	head := childHeading(in, t)
	if r.st.night {
		look.Skin, look.Hair, look.Suit, look.Legs = r.st.nir(look.Skin, false), r.st.nir(look.Hair, false), r.st.nir(look.Suit, false), r.st.nir(look.Legs, false)
		// Skin reflects near infrared well.
		look.Skin = scale(look.Skin, 1.6)
	}
	// Depth and contrast, ramping while the child sinks.
	if in.Depth > 0 {
		f := 1.0
		if in.SinkDur > 0 {
			f = clamp01((t - in.SinkAt) / in.SinkDur)
		}
		st.depth = f * in.Depth
		c := in.Contrast
		if c == 0 {
			c = 1
		}
		st.contrast = 1 - f*(1-c)
		if floor := r.w.Site.Depth.At(math.Max(0, math.Min(L, x))) - 0.2; st.depth > floor {
			st.depth = math.Max(0, floor)
		}
	}
	enter := 0.0 // 0 on the deck, 1 in the water
	if inside && t >= entry {
		enter = clamp01((t - entry) / 0.6)
	}
	sc := &r.objs
	from := len(sc.prims)
	lying := in.Lying && enter >= 1
	var p pose
	bob := 0.015 * math.Sin(2*math.Pi*0.6*t+1)
	swing := 0.0
	armUp := 0.0
	if enter < 1 {
		// Standing or walking on the deck, then dropping in.
		if x2, y2, _ := in.position(t + 0.3); math.Hypot(x2-x, y2-y) > 0.05 {
			swing = 0.35 * math.Sin(2*math.Pi*1.6*t)
		}
		zIn := 0.3*hd - (H - hd/2)
		z := r.st.h + enter*(zIn-r.st.h)
		p = pose{R: rotZ(head), T: [3]float64{x, y, z}}
		armUp = enter * (0.4 + 0.9*look.Spread)
	} else if !lying {
		// Upright in the water: the chin at the surface (or below it when
		// submerged), arms paddling near the surface.
		z := 0.3*hd - (H - hd/2) + bob
		if st.depth > 0 {
			z = math.Min(z, -st.depth-0.5*H)
		}
		p = pose{R: rotZ(head), T: [3]float64{x, y, z}}
		armUp = 0.4 + 0.9*look.Spread + 0.25*math.Sin(2*math.Pi*0.5*t)
		swing = 0.25 * math.Sin(2*math.Pi*0.5*t)
	} else {
		// Face down at the surface: body z along the heading, body x
		// (the front) down; the back just breaks the surface.
		R := rot{{0, -math.Sin(head), math.Cos(head)}, {0, math.Cos(head), math.Sin(head)}, {-1, 0, 0}}
		zc := -0.02 - st.depth + bob*0.3
		c := R.apply([3]float64{0, 0, 0.5 * H})
		p = pose{R: R, T: [3]float64{x - c[0], y - c[1], zc - c[2]}}
		armUp = 0.3 + 1.2*look.Spread
	}
	legR := 0.042 * H
	id := rot{{1, 0, 0}, {0, 1, 0}, {0, 0, 1}}
	// Legs: thigh in the suit's lower colour, shin in skin; they overlap
	// at the knee and reach into the pelvis.
	for _, sgn := range []float64{1, -1} {
		hip := [3]float64{0, sgn * 0.22 * sb, 0.42 * H}
		lr := rotY(sgn * swing)
		th := lr.apply([3]float64{0, 0, -0.12 * H})
		sh := lr.apply([3]float64{0, 0, -0.31 * H})
		sc.ellipsoid(p, [3]float64{hip[0] + th[0], hip[1] + th[1], hip[2] + th[2]}, lr, [3]float64{legR * 1.2, legR * 1.2, 0.14 * H}, look.Legs)
		sc.ellipsoid(p, [3]float64{hip[0] + sh[0], hip[1] + sh[1], hip[2] + sh[2]}, lr, [3]float64{legR * 0.9, legR * 0.9, 0.13 * H}, look.Skin)
	}
	// Pelvis and torso, up to the neck.
	sc.ellipsoid(p, [3]float64{0, 0, 0.42 * H}, id, [3]float64{0.06, sb * 0.36, 0.08 * H}, look.Legs)
	sc.ellipsoid(p, [3]float64{0, 0, 0.6 * H}, id, [3]float64{0.065, sb * 0.43, 0.23 * H}, look.Suit)
	// Arms from the shoulders, rising sideways towards the horizontal.
	for _, sgn := range []float64{1, -1} {
		sh := [3]float64{0, sgn * (sb/2 - 0.01), 0.76 * H}
		ar := rotX(sgn * armUp).mul(rotY(-sgn * swing * 0.8))
		c := ar.apply([3]float64{0, 0, -0.15 * H})
		sc.ellipsoid(p, [3]float64{sh[0] + c[0], sh[1] + c[1], sh[2] + c[2]}, ar, [3]float64{0.034, 0.034, 0.17 * H}, look.Skin)
	}
	// Head and hair (or cap): the hair covers the crown and the back.
	hc := [3]float64{0.005, 0, H - hd/2}
	sc.ellipsoid(p, hc, id, [3]float64{hd / 2, hd / 2 * 0.92, hd / 2 * 1.05}, look.Skin)
	hairDown := math.Max(0.3*hd, look.HairM)
	sc.ellipsoid(p, [3]float64{-0.02, 0, H - hd/2 + 0.012 - hairDown*0.3}, id,
		[3]float64{hd/2 + 0.008, hd/2*0.92 + 0.008, hd/2 + hairDown*0.3}, look.Hair)
	cx, cy, _, _ := sc.footprint(from, len(sc.prims), L, W)
	st.x, st.y = cx, cy
	st.inWater = enter > 0 && cx >= 0 && cx <= L && cy >= 0 && cy <= W
	under := 0.0
	if in.Depth > 0 {
		under = st.contrast
	}
	r.pushObject(from, under, enter < 1 || !lying)
	// The water around a child is stirred: a splash as it gets in, a wake
	// while it swims, a little paddling while upright; none while it
	// floats still or lies deep.
	if enter > 0 && st.depth < 0.3 {
		x0, y0, _ := in.position(t - 0.3)
		x1, y1, _ := in.position(t + 0.3)
		speed := math.Hypot(x1-x0, y1-y0) / 0.6
		splash := 3 * clamp01(1-(t-entry)/2.5)
		a := splash + 5*speed
		if !lying {
			a += 0.6
		}
		if a > 0.05 {
			r.stirAt(st.x, st.y, math.Min(4, a), 0.45+0.3*splash)
		}
	}
	return st
}

// addWalker builds an adult on the deck at time t.
func (r *wRenderer) addWalker(wk Walker, t float64) {
	if len(wk.Path) == 0 || t < wk.Path[0].T || t > wk.Path[len(wk.Path)-1].T {
		return
	}
	c := Child{Path: wk.Path, Enter: wk.Path[0].T}
	x, y, _ := c.position(t)
	head := childHeading(c, t)
	H := wk.HeightM
	sc := &r.objs
	from := len(sc.prims)
	p := pose{R: rotZ(head), T: [3]float64{x, y, r.st.h}}
	x2, y2, _ := c.position(t + 0.3)
	swing := 0.0
	if math.Hypot(x2-x, y2-y) > 0.05 {
		swing = 0.4 * math.Sin(2*math.Pi*0.9*t)
	}
	night := r.st.night
	col := func(c RGB) RGB { return r.st.nir(c, false) }
	skin := col(wk.Skin)
	if night {
		skin = scale(skin, 1.6)
	}
	for _, sgn := range []float64{1, -1} {
		lr := rotY(sgn * swing)
		cc := lr.apply([3]float64{0, 0, -0.24 * H})
		sc.ellipsoid(p, [3]float64{cc[0], sgn * 0.055 * H, 0.48*H + cc[2]}, lr, [3]float64{0.045 * H, 0.045 * H, 0.25 * H}, col(wk.Legs))
	}
	sc.ellipsoid(p, [3]float64{0, 0, 0.65 * H}, rot{{1, 0, 0}, {0, 1, 0}, {0, 0, 1}}, [3]float64{0.07 * H, 0.12 * H, 0.18 * H}, col(wk.Shirt))
	for _, sgn := range []float64{1, -1} {
		ar := rotY(-sgn * swing * 0.8)
		cc := ar.apply([3]float64{0, 0, -0.18 * H})
		sc.ellipsoid(p, [3]float64{cc[0], sgn * 0.15 * H, 0.8*H + cc[2]}, ar, [3]float64{0.032 * H, 0.032 * H, 0.19 * H}, skin)
	}
	sc.ellipsoid(p, [3]float64{0, 0, 0.93 * H}, rot{{1, 0, 0}, {0, 1, 0}, {0, 0, 1}}, [3]float64{0.06 * H, 0.055 * H, 0.07 * H}, skin)
	sc.ellipsoid(p, [3]float64{-0.01 * H, 0, 0.95 * H}, rot{{1, 0, 0}, {0, 1, 0}, {0, 0, 1}}, [3]float64{0.062 * H, 0.058 * H, 0.06 * H}, col(wk.Hair))
	r.pushObject(from, 0, true)
}

// birdAt returns where a bird is at time t, whether it is sitting, and
// whether it is there at all.
func birdAt(b BirdVisit, h, t float64) (x, y, z float64, sitting, ok bool) {
	const fly = 2.0
	rest := 0.05 * b.LengthM
	if !b.OnWater {
		rest = h + 0.18*b.LengthM
	}
	a := deg(b.FromDeg)
	switch {
	case t < b.Start || t > b.Start+2*fly+b.Stay:
		return 0, 0, 0, false, false
	case t < b.Start+fly:
		f := 1 - (t-b.Start)/fly
		return b.X + 8*f*math.Cos(a), b.Y + 8*f*math.Sin(a), rest + 4*f*f, false, true
	case t < b.Start+fly+b.Stay:
		s := t - b.Start - fly
		return b.X + 0.05*math.Sin(s*0.4), b.Y + 0.04*math.Sin(s*0.3+1), rest, true, true
	}
	f := (t - b.Start - fly - b.Stay) / fly
	return b.X - 8*f*math.Cos(a), b.Y - 8*f*math.Sin(a), rest + 4*f*f, false, true
}

func (r *wRenderer) addBird(b BirdVisit, t float64) {
	x, y, z, sitting, ok := birdAt(b, r.st.h, t)
	if !ok {
		return
	}
	L := b.LengthM
	head := deg(b.FromDeg) + math.Pi
	if sitting {
		head += 0.3 * math.Sin(t*0.2)
	}
	sc := &r.objs
	from := len(sc.prims)
	p := pose{R: rotZ(head), T: [3]float64{x, y, z}}
	col := r.st.nir(b.Colour, false)
	id := rot{{1, 0, 0}, {0, 1, 0}, {0, 0, 1}}
	sc.ellipsoid(p, [3]float64{0, 0, 0}, id, [3]float64{L / 2, 0.22 * L, 0.18 * L}, col)
	sc.ellipsoid(p, [3]float64{0.42 * L, 0, 0.16 * L}, id, [3]float64{0.12 * L, 0.1 * L, 0.1 * L}, col)
	if !sitting {
		flap := 0.7 * math.Sin(2*math.Pi*5*t)
		for _, sgn := range []float64{1, -1} {
			wr := rotX(sgn * flap)
			c := wr.apply([3]float64{0, sgn * 0.45 * L, 0})
			sc.ellipsoid(p, c, wr, [3]float64{0.18 * L, 0.42 * L, 0.015 * L}, scale(col, 0.9))
		}
	}
	r.pushObject(from, 0, true)
}

// leafAt returns a leaf's position at time t: it drifts and turns back
// from the walls.
func leafAt(l Leaf, L, W, t float64) (x, y, ang float64, ok bool) {
	if t < l.Arrive {
		return 0, 0, 0, false
	}
	s := t - l.Arrive
	fold := func(v, lo, hi float64) float64 {
		span := hi - lo
		v = math.Mod(v-lo, 2*span)
		if v < 0 {
			v += 2 * span
		}
		if v > span {
			v = 2*span - v
		}
		return lo + v
	}
	x = fold(l.X+l.VX*s+0.01*math.Sin(1.3*s), 0.05, L-0.05)
	y = fold(l.Y+l.VY*s+0.01*math.Sin(1.1*s+2), 0.05, W-0.05)
	return x, y, deg(l.AngleDeg) + l.Spin*s, true
}

func (r *wRenderer) addLeaf(l Leaf, t float64) {
	x, y, ang, ok := leafAt(l, r.s.PoolLength, r.s.PoolWidth, t)
	if !ok {
		return
	}
	a := math.Sqrt(l.AreaM2 * l.Aspect / math.Pi)
	b := l.AreaM2 / (math.Pi * a)
	from := len(r.objs.prims)
	r.objs.flatEllipse(x, y, 0.002, a, b, ang, r.st.nir(l.Colour, true))
	r.pushObject(from, 0, false)
}

// pushObject closes the object made of prims[from:], computing its image
// boxes.
func (r *wRenderer) pushObject(from int, under float64, shadow bool) {
	sc := &r.objs
	ob := object{from: from, to: len(sc.prims), under: under, shadow: shadow}
	var cx, cy, cz float64
	for k := from; k < ob.to; k++ {
		p := &sc.prims[k]
		p.box = r.primBox(p)
		ob.box = ob.box.Union(p.box)
		cx += p.c[0]
		cy += p.c[1]
		cz += p.c[2]
	}
	n := float64(ob.to - from)
	cx, cy, cz = cx/n, cy/n, cz/n
	cam := r.cam.c
	ob.dist = math.Sqrt((cx-cam[0])*(cx-cam[0]) + (cy-cam[1])*(cy-cam[1]) + (cz-cam[2])*(cz-cam[2]))
	ob.sun = 1
	if r.clouds != nil {
		ob.sun = r.clouds.sunAt(cx, cy, r.t)
	}
	sc.objs = append(sc.objs, ob)
}

// primBox is the image box of a prim: its bounding box's corners and, for
// corners under water, the points above them on the surface (a refracted
// image lies between the two), plus a margin for ripples.
func (r *wRenderer) primBox(p *prim) image.Rectangle {
	x0, y0, x1, y1 := math.Inf(1), math.Inf(1), math.Inf(-1), math.Inf(-1)
	add := func(x, y, z float64) {
		u, v, ok := r.cam.project(x, y, z)
		if !ok {
			return
		}
		x0, x1 = math.Min(x0, u), math.Max(x1, u)
		y0, y1 = math.Min(y0, v), math.Max(y1, v)
	}
	under := false
	for k := 0; k < 8; k++ {
		x := p.c[0] + p.ext[0]*float64(2*(k&1)-1)
		y := p.c[1] + p.ext[1]*float64(2*(k>>1&1)-1)
		z := p.c[2] + p.ext[2]*float64(2*(k>>2&1)-1)
		add(x, y, z)
		if z < 0 {
			add(x, y, 0)
			under = true
		}
	}
	if math.IsInf(x0, 1) {
		return image.Rectangle{}
	}
	m := 2.0
	if under {
		m = 9
	}
	b := image.Rect(int(math.Floor(x0-m)), int(math.Floor(y0-m)), int(math.Ceil(x1+m))+1, int(math.Ceil(y1+m))+1)
	return b.Intersect(image.Rect(0, 0, r.W, r.H))
}

// stirAt raises the ripples of the water around (x, y): slope gain 1 + a
// at the centre, falling off over rad metres.
func (r *wRenderer) stirAt(x, y, a, rad float64) {
	x0, y0, x1, y1 := math.Inf(1), math.Inf(1), math.Inf(-1), math.Inf(-1)
	for _, c := range [][2]float64{{-1, -1}, {1, -1}, {1, 1}, {-1, 1}} {
		u, v, ok := r.cam.project(x+2*rad*c[0], y+2*rad*c[1], 0)
		if !ok {
			continue
		}
		x0, x1 = math.Min(x0, u), math.Max(x1, u)
		y0, y1 = math.Min(y0, v), math.Max(y1, v)
	}
	if math.IsInf(x0, 1) {
		return
	}
	box := image.Rect(int(x0)-1, int(y0)-1, int(x1)+2, int(y1)+2).Intersect(image.Rect(0, 0, r.W, r.H))
	cam := r.cam.c
	for v := box.Min.Y; v < box.Max.Y; v++ {
		for u := box.Min.X; u < box.Max.X; u++ {
			i := v*r.W + u
			if r.class[i] != pxWater {
				continue
			}
			d, ok := r.rayAt(float64(u), float64(v))
			if !ok || d[2] >= 0 {
				continue
			}
			s := at(cam, d, -cam[2]/d[2])
			q := ((s[0]-x)*(s[0]-x) + (s[1]-y)*(s[1]-y)) / (rad * rad)
			if q < 6 {
				r.stir[i] = uint8(math.Min(255, float64(r.stir[i])+32*a*math.Exp(-q)))
			}
		}
	}
	r.dirty = append(r.dirty, box)
}
