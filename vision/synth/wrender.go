package synth

import (
	"image"
	"math"
	"math/rand"
	"runtime"
	"sync"
)

// RendererVersion names what the family renderer draws; Cached keys its
// files on it, so change it whenever the output of a scene changes.
const RendererVersion = "family/2"

// Pixel classes of the family renderer.
const (
	pxFar    uint8 = iota // sky or fence
	pxGround              // deck, coping, lawn, pool wall above the water
	pxWater
)

// wpix is the per-renderer table of one water pixel: everything about it
// that does not change from frame to frame.
type wpix struct {
	i     int32
	tile  tilePos // wave tile under the surface point
	caus  tilePos // wave tile under the floor (or wall) point
	cx    int16   // cloud cell of the surface point
	cy    int16   //
	gust  uint16  // gust table entry
	m     [4]float32
	camp  float32 // caustic contrast
	trans float32 // (1 − Fresnel reflectance)·vignette
	kv    [2]float32
	gs    [2]float32 // slope that mirrors the sun into the lens
	gamp  float32    // glitter peak
	lit   float32    // night: lamp light on the floor
	glow  float32    // night: lamp light in the water body
	scat  [3]float32
	sky   [3]float32 // reflected sky, fence or sun-free radiance
}

// gpix is the table of one ground or far pixel.
type gpix struct {
	i   int32
	cx  int16 // cloud cell; -1 for none (sky)
	cy  int16
	alb [3]float32 // albedo·vignette (radiance relative to the sky light for the sky)
	sun float32    // cosine of the sun's incidence
	lit float32    // night: infrared and lamp light
}

// wRenderer draws a family scene in camera space: per-pixel tables are
// built once, then each frame is a pass over them.
type wRenderer struct {
	s     Scene
	w     *World
	st    *site
	cam   lensCam
	W, H  int
	class []uint8
	nx    []float32 // normalised undistorted coordinates per pixel
	ny    []float32
	wp    []wpix
	gp    []gpix
	abase []float32 // under-water colour per pixel (floor or wall through the water)

	waves  *waveTile
	clouds *cloudTex
	gust   *gustLUT
	sunDir [3]float64
	sunW   float64 // direct sun on the floor through the surface
	sunC   [3]float32
	amb    [3]float32
	// toneNoise maps 12-bit linear light and one of 16 noise quantiles
	// (index x<<4 | k) to the output byte; nk holds a noise quantile per
	// byte (with slack for a per-frame offset) and z the quantiles.
	toneNoise []uint8
	nk        []uint8
	z         [16]float32
	rng       *rand.Rand

	out   []byte
	objA  []float32
	objC  []float32
	objM  []uint8
	shade []uint8
	stir  []uint8 // extra ripple slope around children, 1/32 units
	dirty []image.Rectangle

	gain, gainRef, lumRef float64
	lumSum                float64
	lumN                  int

	t          float64   // media time of the frame being drawn
	entries    []float64 // per child: first time inside the pool
	poolMid    float64   // pool centre along the wind, m
	glit       [256]float32
	frozenFrom int    // frame a frozen fault began, or -1
	lastIdx    int    // last frame drawn
	heldRaw    []byte // frozen fault: the picture held
	objs       objScratch
}

// Object layer modes.
const (
	objNone uint8 = iota
	objAbove
	objUnder
)

func newWRenderer(s Scene) *wRenderer {
	w := s.World
	r := &wRenderer{s: s, w: w, st: newSite(&s), cam: newLensCam(s.Camera, w.Lens), W: s.Width, H: s.Height,
		rng: rand.New(rand.NewSource(s.Seed*7 + 3))}
	n := r.W * r.H
	r.class = make([]uint8, n)
	r.nx = make([]float32, n)
	r.ny = make([]float32, n)
	r.abase = make([]float32, 3*n)
	r.out = make([]byte, 3*n)
	r.objA = make([]float32, n)
	r.objC = make([]float32, 3*n)
	r.objM = make([]uint8, n)
	r.shade = make([]uint8, n)
	r.stir = make([]uint8, n)
	for i := range r.shade {
		r.shade[i] = 255
	}
	l := w.Light
	if !l.Night {
		el, az := deg(l.SunElevDeg), deg(l.SunAzDeg)
		r.sunDir = [3]float64{math.Cos(el) * math.Cos(az), math.Cos(el) * math.Sin(az), math.Sin(el)}
		// Direct sun reaching the floor: transmitted through the surface,
		// on a floor facing the refracted sun.
		rs := refract([3]float64{-r.sunDir[0], -r.sunDir[1], -r.sunDir[2]}, [3]float64{0, 0, 1}, WaterIndex)
		r.sunW = l.Sun * (1 - fresnel(r.sunDir[2])) * -rs[2]
		for c := 0; c < 3; c++ {
			r.sunC[c] = float32(l.Sun * l.SunTint[c])
			r.amb[c] = float32(l.Ambient * l.SkyTint[c])
		}
	} else {
		for c := 0; c < 3; c++ {
			r.amb[c] = float32(l.Ambient)
		}
	}
	wrng := rand.New(rand.NewSource(s.Seed*13 + 5))
	r.waves = newWaveTile(wrng, w.Wind.DirDeg)
	r.waves.setCaustics(w.Wind.Slope, 0.6+0.6*w.Water.Caustics)
	if w.Clouds != nil {
		r.clouds = newCloudTex(w.Clouds, s.PoolLength/2, s.PoolWidth/2)
	}
	r.gust = newGustLUT(w.Wind, s.PoolLength, s.PoolWidth)
	r.buildTone()
	for k := range r.glit {
		r.glit[k] = float32(math.Exp(-float64(k) / 32))
	}
	r.frozenFrom = -1
	for _, in := range s.Intruders {
		r.entries = append(r.entries, childEntry(in, s.PoolLength, s.PoolWidth))
	}
	r.poolMid = s.PoolLength/2*r.gust.dir[0] + s.PoolWidth/2*r.gust.dir[1]
	r.nk = make([]uint8, 3*n+65536)
	nrng := rand.New(rand.NewSource(s.Seed*31 + 11))
	for i := range r.nk {
		r.nk[i] = uint8(nrng.Intn(16))
	}
	r.buildRays()
	r.buildTables()
	return r
}

// buildTone fills the tone-and-noise table: linear light → 8 bits by the
// sRGB transfer function (IEC 61966-2-1), then sensor noise of standard
// deviation √(read² + shot²·level) grey levels, drawn as one of 16 equally
// likely quantiles of the normal distribution.
func (r *wRenderer) buildTone() {
	var z [16]float64
	for k := range z {
		z[k] = math.Sqrt2 * math.Erfinv(2*(float64(k)+0.5)/16-1)
		r.z[k] = float32(z[k])
	}
	sn := r.w.Sensor
	r.toneNoise = make([]uint8, 4096*16)
	for i := 0; i < 4096; i++ {
		x := float64(i) / 1024
		var v float64
		if x <= 0.0031308 {
			v = 12.92 * x
		} else {
			v = 1.055*math.Pow(x, 1/2.4) - 0.055
		}
		t := 255 * clamp01(v)
		sig := math.Sqrt(sn.ReadNoise*sn.ReadNoise + sn.Shot*sn.Shot*t)
		for k := range z {
			r.toneNoise[i<<4|k] = uint8(math.Round(math.Max(0, math.Min(255, t+z[k]*sig))))
		}
	}
}

// buildRays inverts the lens for every pixel centre, warm-starting Newton
// from the left neighbour.
func (r *wRenderer) buildRays() {
	l := r.w.Lens
	for v := 0; v < r.H; v++ {
		px, py, warm := 0.0, 0.0, false
		for u := 0; u < r.W; u++ {
			xd, yd := (float64(u)-l.Cx)/l.Fx, (float64(v)-l.Cy)/l.Fy
			var x, y float64
			ok := false
			if warm {
				x, y, ok = r.cam.newton(xd, yd, px+1/l.Fx, py, 6)
			}
			if !ok {
				x, y, ok = r.cam.undistort(xd, yd)
			}
			px, py, warm = x, y, ok
			if !ok {
				x, y = math.NaN(), math.NaN()
			}
			i := v*r.W + u
			r.nx[i], r.ny[i] = float32(x), float32(y)
		}
	}
}

// rayAt returns the unit world direction through raw pixel (u, v) (pixel
// centres at integers), interpolating the per-pixel table.
func (r *wRenderer) rayAt(u, v float64) ([3]float64, bool) {
	if u < 0 {
		u = 0
	}
	if v < 0 {
		v = 0
	}
	if u > float64(r.W-1) {
		u = float64(r.W - 1)
	}
	if v > float64(r.H-1) {
		v = float64(r.H - 1)
	}
	u0, v0 := int(u), int(v)
	u1, v1 := u0+1, v0+1
	if u1 >= r.W {
		u1 = u0
	}
	if v1 >= r.H {
		v1 = v0
	}
	fu, fv := float32(u-float64(u0)), float32(v-float64(v0))
	i00, i10, i01, i11 := v0*r.W+u0, v0*r.W+u1, v1*r.W+u0, v1*r.W+u1
	x := (r.nx[i00]*(1-fu)+r.nx[i10]*fu)*(1-fv) + (r.nx[i01]*(1-fu)+r.nx[i11]*fu)*fv
	y := (r.ny[i00]*(1-fu)+r.ny[i10]*fu)*(1-fv) + (r.ny[i01]*(1-fu)+r.ny[i11]*fu)*fv
	if x != x || y != y {
		return [3]float64{}, false
	}
	return r.camDir(float64(x), float64(y)), true
}

func (r *wRenderer) camDir(x, y float64) [3]float64 {
	var d [3]float64
	for i := 0; i < 3; i++ {
		d[i] = r.cam.r[0][i]*x + r.cam.r[1][i]*y + r.cam.r[2][i]
	}
	n := math.Sqrt(d[0]*d[0] + d[1]*d[1] + d[2]*d[2])
	return [3]float64{d[0] / n, d[1] / n, d[2] / n}
}

// vignette is the lens's light fall-off at a pixel (1 at the centre).
func (r *wRenderer) vignette(u, v float64) float64 {
	dx := (u - r.w.Lens.Cx) / float64(r.W/2)
	dy := (v - r.w.Lens.Cy) / float64(r.W/2)
	return 1 - r.w.Sensor.Vignette*math.Min(1, (dx*dx+dy*dy)/(1+float64(r.H*r.H)/float64(r.W*r.W)))
}

// sample is what one sight line shows in the static pass.
type sample struct {
	kind uint8
	col  RGB // albedo (ground, fence), radiance/ambient (sky), under-water colour (water)
	p    [3]float64
}

// subOffsets are the four sample positions within a pixel.
var subOffsets = [4][2]float64{{-0.25, -0.25}, {0.25, -0.25}, {-0.25, 0.25}, {0.25, 0.25}}

// buildTables traces every pixel (four samples for colour, the centre for
// geometry) and fills the per-pixel tables. Rows are shared between two
// goroutines; the result does not depend on how.
func (r *wRenderer) buildTables() {
	type rowOut struct {
		wp []wpix
		gp []gpix
	}
	rows := make([]rowOut, r.H)
	floorX := make([]float32, r.W*r.H)
	floorY := make([]float32, r.W*r.H)
	floorD := make([]float32, r.W*r.H)
	workers := 2
	if runtime.NumCPU() < 2 {
		workers = 1
	}
	var wg sync.WaitGroup
	next := make(chan int, r.H)
	for v := 0; v < r.H; v++ {
		next <- v
	}
	close(next)
	for k := 0; k < workers; k++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for v := range next {
				var ro rowOut
				for u := 0; u < r.W; u++ {
					r.buildPixel(u, v, &ro.wp, &ro.gp, floorX, floorY, floorD)
				}
				rows[v] = ro
			}
		}()
	}
	wg.Wait()
	for _, ro := range rows {
		r.wp = append(r.wp, ro.wp...)
		r.gp = append(r.gp, ro.gp...)
	}
	r.buildShift(floorX, floorY, floorD)
}

// buildPixel fills the tables of pixel (u, v).
func (r *wRenderer) buildPixel(u, v int, wps *[]wpix, gps *[]gpix, floorX, floorY, floorD []float32) {
	i := v*r.W + u
	st := r.st
	cam := [3]float64{r.s.Camera.X, r.s.Camera.Y, r.s.Camera.Height}
	vig := r.vignette(float64(u), float64(v))
	d, ok := r.rayAt(float64(u), float64(v))
	if !ok {
		r.class[i] = pxFar
		*gps = append(*gps, gpix{i: int32(i), cx: -1})
		return
	}
	hit := st.traceAir(cam, d)
	// Colour from the centre where a pixel covers little of the scene,
	// else from four samples.
	var col RGB
	offs := subOffsets[:]
	if hit.kind == hitSky || hit.t/r.w.Lens.Fx < 0.012 {
		offs = [][2]float64{{0, 0}}
	}
	for _, o := range offs {
		sd, ok := r.rayAt(float64(u)+o[0], float64(v)+o[1])
		if !ok {
			sd = d
		}
		c := r.sampleColour(cam, sd)
		for k := range col {
			col[k] += c[k] / float64(len(offs))
		}
	}
	l := r.w.Light
	switch hit.kind {
	case hitSky, hitFence, hitGround:
		if hit.kind == hitGround {
			r.class[i] = pxGround
		} else {
			r.class[i] = pxFar
		}
		g := gpix{i: int32(i), cx: -1, cy: -1}
		for k := range col {
			g.alb[k] = float32(col[k] * vig)
		}
		if hit.kind != hitSky {
			g.cx, g.cy = cloudCell16(hit.p[0]), cloudCell16(hit.p[1])
			n := hit.n
			g.sun = float32(math.Max(0, n[0]*r.sunDir[0]+n[1]*r.sunDir[1]+n[2]*r.sunDir[2]))
			if l.Night {
				g.lit = float32(r.irAt(cam, hit.p, n))
			}
		}
		// The table keeps the under-water colour too, for the shift of
		// neighbouring water pixels.
		copy3(r.abase[3*i:], col)
		*gps = append(*gps, g)
		return
	}
	r.class[i] = pxWater
	s := hit.p
	up := [3]float64{0, 0, 1}
	cosI := -d[2]
	R := fresnel(cosI)
	p := wpix{i: int32(i), tile: tileAt(s[0], s[1]), cx: cloudCell16(s[0]), cy: cloudCell16(s[1]), gust: r.gust.index(s[0], s[1])}
	p.trans = float32((1 - R) * vig)
	// What the surface mirrors: the sky or the fence.
	rd := [3]float64{d[0], d[1], -d[2]}
	ref := st.traceAir([3]float64{s[0], s[1], 1e-6}, rd)
	var rad RGB
	switch ref.kind {
	case hitFence, hitGround:
		a := st.fence(ref.p[0], ref.p[1], ref.p[2])
		if ref.kind == hitGround {
			a = st.ground(ref.p[0], ref.p[1])
		}
		lf := 1.0
		if !l.Night {
			lf = 1 + l.Sun/math.Max(l.Ambient, 0.05)*math.Max(0, ref.n[0]*r.sunDir[0]+ref.n[1]*r.sunDir[1]+ref.n[2]*r.sunDir[2])
		}
		rad = scale(a, lf)
	default:
		rad = st.sky(rd)
	}
	for k := 0; k < 3; k++ {
		p.sky[k] = float32(R * rad[k] * float64(r.amb[k]) * vig)
	}
	h := math.Hypot(d[0], d[1])
	if h > 1e-9 {
		p.kv = [2]float32{float32(-2 * d[0]), float32(-2 * d[1])}
	}
	// Glitter: the slope whose normal halves the angle between the view
	// and the sun.
	if !l.Night && l.Sun > 0 {
		hv := [3]float64{-d[0] + r.sunDir[0], -d[1] + r.sunDir[1], -d[2] + r.sunDir[2]}
		hn := math.Sqrt(hv[0]*hv[0] + hv[1]*hv[1] + hv[2]*hv[2])
		if hn > 1e-9 && hv[2]/hn > 0.05 {
			p.gs = [2]float32{float32(-hv[0] / hv[2]), float32(-hv[1] / hv[2])}
			cosH := (-d[0]*hv[0] - d[1]*hv[1] - d[2]*hv[2]) / hn
			p.gamp = float32(r.w.Water.Glitter * 40 * fresnel(cosH) * vig)
		}
	}
	// Under the surface.
	td := refract(d, up, WaterIndex)
	un := st.traceUnder(s, td)
	depth := -un.p[2]
	floorX[i], floorY[i], floorD[i] = float32(un.p[0]), float32(un.p[1]), float32(depth)
	if un.wall {
		p.caus = tileAt(un.p[0]+un.p[1], un.p[2])
	} else {
		p.caus = tileAt(un.p[0], un.p[1])
	}
	wl := r.w.Water
	ks := wl.Turbidity*4 + 0.1
	for k := 0; k < 3; k++ {
		p.scat[k] = float32(wl.Scatter[k] * (1 - math.Exp(-ks*un.path)) * vig * (1 - R))
	}
	cf := wl.Caustics * 1.3 * math.Exp(-depth/3)
	if un.wall {
		cf *= 0.35
	}
	if l.Night {
		cf = 0
		lit, glow := r.lampsAt(un.p, s)
		p.lit, p.glow = float32(lit), float32(glow)
	}
	p.camp = float32(cf) // the footprint fall-off is applied in buildShift
	// Under-water colour: the floor's colour through the water, without
	// the light (applied per frame).
	copy3(r.abase[3*i:], col)
	*wps = append(*wps, p)
}

// sampleColour returns the static colour one sight line sees.
func (r *wRenderer) sampleColour(cam, d [3]float64) RGB {
	st := r.st
	hit := st.traceAir(cam, d)
	switch hit.kind {
	case hitSky:
		return st.sky(d)
	case hitFence:
		return st.fence(hit.p[0], hit.p[1], hit.p[2])
	case hitGround:
		if hit.p[2] < st.h-1e-6 { // the pool wall above the water
			return st.wall(hit.p[0], hit.p[1], hit.p[2])
		}
		return st.ground(hit.p[0], hit.p[1])
	}
	td := refract(d, [3]float64{0, 0, 1}, WaterIndex)
	un := st.traceUnder(hit.p, td)
	var a RGB
	if un.wall {
		a = st.wall(un.p[0], un.p[1], un.p[2])
	} else {
		a = st.floor(un.p[0], un.p[1])
	}
	// Light goes down about depth·1.1 m and comes back along the view.
	depth := -un.p[2]
	wl := r.w.Water
	ext := RGB{wl.Absorb[0] + wl.Turbidity, wl.Absorb[1] + wl.Turbidity, wl.Absorb[2] + wl.Turbidity}
	if r.w.Light.Night {
		// Near infrared hardly crosses water; the lamps' visible light
		// does (applied in lampsAt), so keep the visible attenuation.
		return RGB{a[0] * math.Exp(-ext[0]*un.path), a[1] * math.Exp(-ext[1]*un.path), a[2] * math.Exp(-ext[2]*un.path)}
	}
	L := un.path + depth*1.1
	return RGB{a[0] * math.Exp(-ext[0]*L), a[1] * math.Exp(-ext[1]*L), a[2] * math.Exp(-ext[2]*L)}
}

// irAt is the infrared illuminator's light on a dry surface at p with
// normal n: inverse square from the lens, times the cosine.
func (r *wRenderer) irAt(cam, p, n [3]float64) float64 {
	d := [3]float64{cam[0] - p[0], cam[1] - p[1], cam[2] - p[2]}
	d2 := d[0]*d[0] + d[1]*d[1] + d[2]*d[2]
	c := (d[0]*n[0] + d[1]*n[1] + d[2]*n[2]) / math.Sqrt(d2)
	return r.w.Light.IR * 12 * math.Max(0, c) / d2
}

// lampsAt returns the pool lamps' light on an under-water point and the
// glow of the water body around a surface point.
func (r *wRenderer) lampsAt(p, s [3]float64) (lit, glow float64) {
	for _, lm := range r.w.Lamps {
		d2 := (p[0]-lm.X)*(p[0]-lm.X) + (p[1]-lm.Y)*(p[1]-lm.Y) + (p[2]-lm.Z)*(p[2]-lm.Z)
		lit += lm.Power * 0.6 / (0.15 + d2) * math.Exp(-0.3*math.Sqrt(d2))
		e2 := (s[0]-lm.X)*(s[0]-lm.X) + (s[1]-lm.Y)*(s[1]-lm.Y) + lm.Z*lm.Z
		glow += lm.Power * 0.8 * math.Exp(-math.Sqrt(e2)/1.2)
	}
	return lit, glow
}

// buildShift sets, for each water pixel, the matrix turning a surface
// slope into the pixel shift of the floor seen through it (refraction
// moves the floor point by about depth·(1 − 1/n)·slope), and fades the
// caustics where a pixel covers more floor than a caustic cell.
func (r *wRenderer) buildShift(fx, fy, fd []float32) {
	for k := range r.wp {
		p := &r.wp[k]
		i := int(p.i)
		u, v := i%r.W, i/r.W
		j1, j2 := i+1, i+r.W
		s1, s2 := float32(1), float32(1)
		if u+1 >= r.W || r.class[j1] != pxWater {
			j1, s1 = i-1, -1
		}
		if v+1 >= r.H || r.class[j2] != pxWater {
			j2, s2 = i-r.W, -1
		}
		if j1 < 0 || j2 < 0 || r.class[j1] != pxWater || r.class[j2] != pxWater {
			continue
		}
		a, b := (fx[j1]-fx[i])*s1, (fx[j2]-fx[i])*s2 // dFx/du, dFx/dv
		c, d := (fy[j1]-fy[i])*s1, (fy[j2]-fy[i])*s2 // dFy/du, dFy/dv
		det := a*d - b*c
		if math.Abs(float64(det)) < 1e-12 {
			continue
		}
		k := fd[i] * float32(1-1/WaterIndex)
		// (du, dv) = J⁻¹·Δ with Δ = k·slope.
		p.m = [4]float32{d / det * k, -b / det * k, -c / det * k, a / det * k}
		foot := math.Sqrt(math.Abs(float64(det))) // m per pixel on the floor
		p.camp *= float32(1 / (1 + (foot/0.05)*(foot/0.05)))
	}
}

func cloudCell16(x float64) int16 {
	return int16(int(math.Floor(x/cloudCell)) & cloudMask)
}

func copy3(dst []float32, c RGB) {
	dst[0], dst[1], dst[2] = float32(c[0]), float32(c[1]), float32(c[2])
}
