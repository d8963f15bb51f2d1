package synth

import (
	"math"
	"math/rand"
	"sort"
)

// Wave tile: a periodic patch of water surface, tileN cells of tileM
// metres, holding the surface slope and the caustic light on the floor for
// the current frame. It is rebuilt each frame from per-renderer tables.
const (
	tileN     = 192
	tileCellM = 0.02
	tileM     = tileN * tileCellM
	nWaves    = 16
)

// Capillary-gravity dispersion ω² = g·k + (σ/ρ)·k³ with g = 9.81 m/s² and
// σ/ρ = 7.28e-5 m³/s² (surface tension of water at 20 °C over its density,
// CRC Handbook, from memory).
func waveOmega(k float64) float64 { return math.Sqrt(9.81*k + 7.28e-5*k*k*k) }

type waveTile struct {
	ax, ay, om [nWaves]float32 // slope amplitude per axis, angular frequency
	ky         [nWaves]float64
	colS, colC [nWaves][tileN]float32 // sin, cos of kx·x per column
	rowS, rowC [nWaves][tileN]float32 // sin, cos of ky·y − ωt per row (per frame)
	sx, sy     []float32              // slope per cell, for unit RMS slope
	caus       []float32              // caustic light per cell, mean 1
	acc        []float32
	// causK is the caustic displacement, cells per unit of normalised
	// slope, at slope causRef; set by setCaustics.
	causK, causRef float64
	divRMS         float64
}

// newWaveTile draws nWaves ripple trains of 8–80 cm wavelength heading
// mostly downwind, snapped to the tile's lattice so the tile wraps, with
// slope amplitudes normalised to a unit RMS slope.
func newWaveTile(rng *rand.Rand, windDeg float64) *waveTile {
	w := &waveTile{sx: make([]float32, tileN*tileN), sy: make([]float32, tileN*tileN), caus: make([]float32, tileN*tileN), acc: make([]float32, tileN*tileN)}
	var sum, div float64
	amps := make([]float64, nWaves)
	kxs := make([]float64, nWaves)
	kys := make([]float64, nWaves)
	for i := 0; i < nWaves; i++ {
		lambda := math.Exp(math.Log(0.08) + rng.Float64()*(math.Log(0.8)-math.Log(0.08)))
		dir := deg(windDeg) + rng.NormFloat64()*1.1
		k := 2 * math.Pi / lambda
		m := math.Round(k * math.Cos(dir) * tileM / (2 * math.Pi))
		n := math.Round(k * math.Sin(dir) * tileM / (2 * math.Pi))
		if m == 0 && n == 0 {
			m = 1
		}
		kxs[i], kys[i] = 2*math.Pi*m/tileM, 2*math.Pi*n/tileM
		// Slope amplitude falls with wavenumber.
		amps[i] = math.Pow(math.Hypot(kxs[i], kys[i]), -0.5) * (0.5 + rng.Float64())
		sum += amps[i] * amps[i] / 2
	}
	norm := 1 / math.Sqrt(sum)
	for i := 0; i < nWaves; i++ {
		k := math.Hypot(kxs[i], kys[i])
		s := amps[i] * norm // slope amplitude of this train
		div += s * s * k * k / 2
		w.ax[i] = float32(s * kxs[i] / k)
		w.ay[i] = float32(s * kys[i] / k)
		w.om[i] = float32(waveOmega(k))
		w.ky[i] = kys[i]
		for c := 0; c < tileN; c++ {
			a := kxs[i] * float64(c) * tileCellM
			w.colS[i][c] = float32(math.Sin(a))
			w.colC[i][c] = float32(math.Cos(a))
		}
	}
	// RMS divergence of the unit slope field, per cell.
	w.divRMS = math.Sqrt(div) * tileCellM
	return w
}

// setCaustics chooses the caustic displacement so that at RMS slope rms
// the light is focused into a net: caustics form where the divergence of
// the light's displacement approaches 1, so the displacement per unit
// slope is focus/divRMS cells (focus 0.5 soft … 1.1 sharp). Real nets also
// come from ripples too short for the tile, so this is set by look.
func (w *waveTile) setCaustics(rms, focus float64) {
	w.causRef = rms
	w.causK = focus / w.divRMS
}

// update computes the slope field at time t and, when caustics is set,
// the caustic light for a water slope of rms: each cell's light goes where
// the surface slope bends it on its way to the floor (a small-angle photon
// map; one photon per cell, so the mean is 1).
func (w *waveTile) update(t float64, rms float64, caustics bool) {
	for i := 0; i < nWaves; i++ {
		ph := -float64(w.om[i]) * t
		for r := 0; r < tileN; r++ {
			a := w.ky[i]*float64(r)*tileCellM + ph
			w.rowS[i][r] = float32(math.Sin(a))
			w.rowC[i][r] = float32(math.Cos(a))
		}
	}
	for r := 0; r < tileN; r++ {
		sx := w.sx[r*tileN : r*tileN+tileN]
		sy := w.sy[r*tileN : r*tileN+tileN]
		for c := range sx {
			sx[c], sy[c] = 0, 0
		}
		for i := 0; i < nWaves; i++ {
			rs, rc := w.rowS[i][r], w.rowC[i][r]
			ax, ay := w.ax[i], w.ay[i]
			cs, cc := &w.colS[i], &w.colC[i]
			for c := 0; c < tileN; c++ {
				v := cc[c]*rc - cs[c]*rs // cos(kx·x + ky·y − ωt)
				sx[c] += ax * v
				sy[c] += ay * v
			}
		}
	}
	if !caustics {
		return
	}
	for i := range w.acc {
		w.acc[i] = 0
	}
	// Displacement grows with the slope: refraction turns a slope s into a
	// ray tilt of about s·(1 − 1/n).
	k := float32(w.causK * rms / math.Max(w.causRef, 1e-6))
	const wrap = tileN * 64
	for r := 0; r < tileN; r++ {
		for c := 0; c < tileN; c++ {
			i := r*tileN + c
			x := float32(c) + k*w.sx[i] + wrap
			y := float32(r) + k*w.sy[i] + wrap
			ix, iy := int(x), int(y)
			fx, fy := x-float32(ix), y-float32(iy)
			ix0, iy0 := ix%tileN, iy%tileN
			ix1, iy1 := (ix0+1)%tileN, (iy0+1)%tileN
			w.acc[iy0*tileN+ix0] += (1 - fx) * (1 - fy)
			w.acc[iy0*tileN+ix1] += fx * (1 - fy)
			w.acc[iy1*tileN+ix0] += (1 - fx) * fy
			w.acc[iy1*tileN+ix1] += fx * fy
		}
	}
	// A light blur (the sun's disc and the pixel) and a cap on the peaks.
	for r := 0; r < tileN; r++ {
		up, dn := ((r+tileN-1)%tileN)*tileN, ((r+1)%tileN)*tileN
		row := r * tileN
		for c := 0; c < tileN; c++ {
			l, rr := (c+tileN-1)%tileN, (c+1)%tileN
			v := 0.4*w.acc[row+c] + 0.15*(w.acc[row+l]+w.acc[row+rr]+w.acc[up+c]+w.acc[dn+c])
			if v > 5 {
				v = 5
			}
			w.caus[row+c] = v
		}
	}
}

// tilePos is a point's place in the tile for bilinear reads: the cell
// whose centre is up-left of it and the fractions (0–255) towards the next.
type tilePos struct {
	c, r, fx, fy uint8
}

func tileAt(x, y float64) tilePos {
	u, v := x/tileCellM-0.5, y/tileCellM-0.5
	fu, fv := math.Floor(u), math.Floor(v)
	c := ((int(fu) % tileN) + tileN) % tileN
	r := ((int(fv) % tileN) + tileN) % tileN
	return tilePos{uint8(c), uint8(r), uint8((u - fu) * 255), uint8((v - fv) * 255)}
}

// bilinear reads a tile field at p.
func bilinear(f []float32, p tilePos) float32 {
	c0, r0 := int(p.c), int(p.r)*tileN
	c1, r1 := c0+1, r0+tileN
	if c1 == tileN {
		c1 = 0
	}
	if r1 == tileN*tileN {
		r1 = 0
	}
	fx, fy := float32(p.fx)*(1.0/255), float32(p.fy)*(1.0/255)
	a := f[r0+c0] + fx*(f[r0+c1]-f[r0+c0])
	b := f[r1+c0] + fx*(f[r1+c1]-f[r1+c0])
	return a + fy*(b-a)
}

// Cloud shadows: a periodic texture of the fraction of sunlight that
// reaches the ground, moved across the site.
const (
	cloudN    = 512
	cloudMask = cloudN - 1
	cloudCell = 0.25 // m
)

type cloudTex struct {
	sun      []float32
	vx, vy   float64 // m/s
	ox, oy   float64 // m, texture offset at t = Cross
	cross    float64
	constant bool
}

// newCloudTex builds the shadow field: smooth noise with features of tens
// of metres, cut at the level that shades Cover of the ground, with an edge
// EdgeM wide. It shifts the field so a shadow edge crosses the pool centre
// (cx, cy) at Cross.
func newCloudTex(c *Clouds, cx, cy float64) *cloudTex {
	ct := &cloudTex{sun: make([]float32, cloudN*cloudN)}
	seed := uint64(c.Seed)
	span := cloudN * cloudCell
	// Periodic value noise (lattice indices wrap) so the tile wraps;
	// the coarsest cells are about 25 m.
	field := make([]float64, cloudN*cloudN)
	const base = 5
	for r := 0; r < cloudN; r++ {
		for q := 0; q < cloudN; q++ {
			var v, amp, norm float64 = 0, 1, 0
			for o, p := 0, int64(base); o < 4; o, p = o+1, p*2 {
				x, y := float64(q)*float64(p)/cloudN, float64(r)*float64(p)/cloudN
				v += amp * vnoiseP(x, y, p, seed+uint64(o)*7919)
				norm += amp
				amp *= 0.5
			}
			field[r*cloudN+q] = v / norm
		}
	}
	// The level that leaves Cover of the field shaded.
	sorted := append([]float64(nil), field...)
	sort.Float64s(sorted)
	th := sorted[int(float64(len(sorted)-1)*(1-c.Cover))]
	// Edge: the field's typical gradient is about 0.03 per metre.
	e := math.Max(0.002, c.EdgeM*0.03/2)
	for i, v := range field {
		ct.sun[i] = float32(1 - c.Block*smoothstep(th-e, th+e, v))
	}
	dir := deg(c.DirDeg)
	ct.vx, ct.vy = c.SpeedMS*math.Cos(dir), c.SpeedMS*math.Sin(dir)
	ct.cross = c.Cross
	// Find an edge along the line of motion and bring it to the centre.
	ux, uy := math.Cos(dir), math.Sin(dir)
	first := ct.at(0, 0) > 0.5
	for s := 0.0; s < span; s += cloudCell {
		if (ct.at(s*ux, s*uy) > 0.5) != first {
			ct.ox, ct.oy = s*ux-cx, s*uy-cy
			break
		}
	}
	return ct
}

// at samples the field at texture metres (x, y).
func (ct *cloudTex) at(x, y float64) float32 {
	q := int(math.Floor(x/cloudCell)) & cloudMask
	r := int(math.Floor(y/cloudCell)) & cloudMask
	return ct.sun[r*cloudN+q]
}

// shift returns the texture offset in cells at time t: a point (x, y) of
// the site reads cell (x/cell + sx, y/cell + sy).
func (ct *cloudTex) shift(t float64) (int, int) {
	dx := ct.ox - ct.vx*(t-ct.cross)
	dy := ct.oy - ct.vy*(t-ct.cross)
	return int(math.Floor(dx / cloudCell)), int(math.Floor(dy / cloudCell))
}

// sunAt returns the sunlit fraction at site point (x, y) at time t.
func (ct *cloudTex) sunAt(x, y, t float64) float64 {
	if ct == nil {
		return 1
	}
	sx, sy := ct.shift(t)
	q := (int(math.Floor(x/cloudCell)) + sx) & cloudMask
	r := (int(math.Floor(y/cloudCell)) + sy) & cloudMask
	return float64(ct.sun[r*cloudN+q])
}

// Gusts: a table of the slope gain along the wind direction, rebuilt each
// frame.
const gustN = 512

type gustLUT struct {
	p0, step float64 // metres along the wind at entry 0, metres per entry
	g        [gustN]float32
	dir      [2]float64
}

func newGustLUT(w Wind, L, W float64) *gustLUT {
	d := deg(w.DirDeg)
	g := &gustLUT{dir: [2]float64{math.Cos(d), math.Sin(d)}}
	lo, hi := math.Inf(1), math.Inf(-1)
	for _, c := range [][2]float64{{-1, -1}, {L + 1, -1}, {L + 1, W + 1}, {-1, W + 1}} {
		p := c[0]*g.dir[0] + c[1]*g.dir[1]
		lo, hi = math.Min(lo, p), math.Max(hi, p)
	}
	g.p0, g.step = lo, (hi-lo)/(gustN-1)
	return g
}

// index returns the table entry of a point.
func (g *gustLUT) index(x, y float64) uint16 {
	p := x*g.dir[0] + y*g.dir[1]
	i := int(math.Round((p - g.p0) / g.step))
	if i < 0 {
		i = 0
	}
	if i >= gustN {
		i = gustN - 1
	}
	return uint16(i)
}

// update fills the table for time t: a slow swell of the whole wind plus
// each gust's band, centred on the pool's middle halfway through the gust.
func (g *gustLUT) update(w Wind, t, pc float64) {
	base := 1 + 0.15*math.Sin(2*math.Pi*t/23+1)
	for i := range g.g {
		g.g[i] = float32(base)
	}
	for _, gu := range w.Gusts {
		if t < gu.Start || t > gu.Start+gu.Dur {
			continue
		}
		env := math.Sin(math.Pi * (t - gu.Start) / gu.Dur)
		centre := pc + gu.SpeedMS*(t-gu.Start-gu.Dur/2)
		hw := gu.WidthM / 2
		for i := range g.g {
			p := g.p0 + float64(i)*g.step
			q := (p - centre) / hw
			g.g[i] += float32((gu.Gain - 1) * env * math.Exp(-q*q))
		}
	}
}

// at returns the gain at a point.
func (g *gustLUT) at(x, y float64) float64 { return float64(g.g[g.index(x, y)]) }
