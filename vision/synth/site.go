package synth

import "math"

// Hit kinds of a sight line.
const (
	hitSky uint8 = iota
	hitFence
	hitGround // deck, coping, lawn, or the pool wall above the water
	hitWater
)

// site answers what a sight line meets and what colour it is there.
type site struct {
	s       *Scene
	w       *World
	L, W    float64
	h       float64 // deck height above the water
	seed    uint64
	lanes   []float64 // lane centre lines, y
	sunk    [][4]float64
	night   bool
	yard    [4]float64 // x0, x1, y0, y1 of the fence line
	propRot [][2]float64
}

func newSite(s *Scene) *site {
	w := s.World
	st := &site{s: s, w: w, L: s.PoolLength, W: s.PoolWidth, h: w.Site.DeckHeight, seed: uint64(s.Seed)*2654435761 + 17, night: w.Light.Night}
	st.yard = [4]float64{-w.Site.Yard[0], st.L + w.Site.Yard[1], -w.Site.Yard[2], st.W + w.Site.Yard[3]}
	for _, p := range w.Site.Props {
		st.propRot = append(st.propRot, [2]float64{math.Cos(deg(p.AngleDeg)), math.Sin(deg(p.AngleDeg))})
	}
	f := w.Site.Floor
	for k := 1; k <= f.Lanes; k++ {
		st.lanes = append(st.lanes, st.W*float64(k)/float64(f.Lanes+1))
	}
	for k := 0; k < f.Sunk; k++ {
		hs := uint64(f.SunkSeed)
		st.sunk = append(st.sunk, [4]float64{hash2(int64(k), 1, hs) * st.L, hash2(int64(k), 2, hs) * st.W, 0.04 + 0.05*hash2(int64(k), 3, hs), hash2(int64(k), 4, hs) * math.Pi})
	}
	return st
}

// nir turns a colour into its grey look under an infrared illuminator:
// foliage reflects near infrared strongly, most else about as it looks.
func (st *site) nir(c RGB, foliage bool) RGB {
	if !st.night {
		return c
	}
	v := lum(c)
	if foliage {
		v = 0.45 + 0.2*(v-0.1)
	}
	return RGB{v, v, v}
}

// floor returns the floor finish at (x, y).
func (st *site) floor(x, y float64) RGB {
	f := st.w.Site.Floor
	c := f.Base
	switch f.Kind {
	case "plaster":
		m := fbm(x, y, 1.5, 3, st.seed+1)
		c = mix(c, f.Second, clamp01((m-0.5)*3*f.Mottle+0.5*f.Mottle))
	case "tiles":
		tx, ty := x/f.TileM, y/f.TileM
		ix, iy := math.Floor(tx), math.Floor(ty)
		c = scale(c, 0.93+0.14*hash2(int64(ix), int64(iy), st.seed+2))
		g := 0.005 / f.TileM
		if tx-ix < g || ty-iy < g {
			c = f.Second
		}
		c = mix(c, scale(c, 0.8), f.Mottle*fbm(x, y, 0.8, 2, st.seed+3))
	case "pebble":
		m := fbm(x, y, 40, 2, st.seed+4)
		c = mix(c, f.Second, clamp01(m*f.Mottle*1.5))
	case "liner":
		m := fbm(x, y, 2, 2, st.seed+5)
		c = mix(c, scale(c, 0.85), m*f.Mottle*2)
		// A mosaic border along the walls.
		e := math.Min(math.Min(x, st.L-x), math.Min(y, st.W-y))
		if e < f.TileM {
			ix, iy := int64(math.Floor(x/0.08)), int64(math.Floor(y/0.08))
			if (ix+iy)%2 == 0 {
				c = f.Second
			}
		}
	}
	for _, ly := range st.lanes {
		lw := f.LaneM / 2
		inLane := math.Abs(y-ly) < lw && x > 1 && x < st.L-1
		// T-bars at both ends.
		tbar := math.Abs(y-ly) < 0.5 && ((x > 1 && x < 1+2*lw) || (x < st.L-1 && x > st.L-1-2*lw))
		if inLane || tbar {
			c = f.LaneRGB
		}
	}
	for _, k := range st.sunk {
		dx, dy := x-k[0], y-k[1]
		ca, sa := math.Cos(k[3]), math.Sin(k[3])
		u, v := (dx*ca+dy*sa)/k[2], (-dx*sa+dy*ca)/(k[2]*0.5)
		if u*u+v*v < 1 {
			c = RGB{0.03, 0.06, 0.09}
		}
	}
	return st.nir(c, false)
}

// wall returns the pool's inner wall at height z (negative under water).
func (st *site) wall(x, y, z float64) RGB {
	w := st.w.Site
	if w.WaterlineM > 0 && z > -w.WaterlineM {
		ix := int64(math.Floor((x + y) / 0.15))
		iz := int64(math.Floor(z / 0.15))
		return st.nir(scale(w.WaterlineTile, 0.9+0.2*hash2(ix, iz, st.seed+6)), false)
	}
	return st.nir(w.Wall, false)
}

// ground returns the colour of the ground plane at (x, y): coping, deck,
// props or lawn.
func (st *site) ground(x, y float64) RGB {
	ws := st.w.Site
	dx := math.Max(-x, x-st.L)
	dy := math.Max(-y, y-st.W)
	e := math.Max(dx, dy) // distance outside the pool rectangle (Chebyshev)
	for k, p := range ws.Props {
		cs := st.propRot[k]
		u, v := (x-p.X)*cs[0]+(y-p.Y)*cs[1], -(x-p.X)*cs[1]+(y-p.Y)*cs[0]
		if math.Abs(u) < p.L/2 && math.Abs(v) < p.W/2 {
			stripe := 0.9
			if math.Mod(u+10, 0.12) < 0.06 {
				stripe = 1
			}
			return st.nir(scale(p.Colour, stripe), false)
		}
	}
	switch {
	case e < ws.CopingM:
		c := scale(ws.Coping, 0.94+0.12*fbm(x, y, 6, 2, st.seed+7))
		along := x
		if dy < dx {
			along = y
		}
		if math.Mod(along+100, 0.6) < 0.008 {
			c = scale(c, 0.7)
		}
		return st.nir(c, false)
	case e < ws.CopingM+ws.DeckM:
		return st.nir(st.deck(x, y), false)
	}
	g := 0.8 + 0.4*fbm(x, y, 3, 3, st.seed+8)
	return st.nir(scale(ws.Lawn, g), true)
}

func (st *site) deck(x, y float64) RGB {
	d := st.w.Site.Deck
	sz := d.SizeM
	n := fbm(x, y, 8, 2, st.seed+9)
	switch d.Kind {
	case "pavers", "stone":
		row := math.Floor(y / sz)
		off := 0.0
		if d.Kind == "stone" {
			off = hash2(int64(row), 0, st.seed+10) * sz
		} else if int64(row)%2 != 0 {
			off = sz / 2
		}
		w := sz
		if d.Kind == "stone" {
			w = sz * (0.8 + 0.6*hash2(int64(row), 1, st.seed+10))
		}
		col := math.Floor((x + off) / w)
		k := hash2(int64(col), int64(row), st.seed+11)
		c := mix(d.Base, d.Second, k*0.6+0.3*n)
		fx, fy := (x+off)/w-col, y/sz-row
		j := 0.012 / sz
		if fx < j || fy < j {
			c = scale(d.Second, 0.7)
		}
		return c
	case "wood":
		b := math.Floor(y / sz)
		k := hash2(int64(b), 0, st.seed+12)
		grain := 0.85 + 0.3*vnoise(x*1.5, y*40, st.seed+13)
		c := scale(mix(d.Base, d.Second, k), grain)
		if y/sz-b < 0.06 {
			c = RGB{0.02, 0.03, 0.04}
		}
		return c
	}
	c := mix(d.Base, d.Second, n)
	if math.Mod(x+100, sz) < 0.01 || math.Mod(y+100, sz) < 0.01 {
		c = scale(c, 0.75)
	}
	return c
}

// fence returns the colour of the garden boundary at a point on it.
func (st *site) fence(x, y, z float64) RGB {
	f := st.w.Site.Fence
	along := x + y
	if f.Kind == "hedge" {
		n := fbm(along, z, 1/f.SizeM, 3, st.seed+14)
		return st.nir(mix(f.Second, f.Base, clamp01(n*1.6-0.2)), true)
	}
	c := scale(f.Base, 0.9+0.15*fbm(along, z, 2, 2, st.seed+15))
	if math.Mod(along+100, f.SizeM) < 0.015 {
		c = f.Second
	}
	return st.nir(c, false)
}

// sky returns the sky's radiance in a direction (unit, z up), relative to
// the ambient light: a bright haze near the horizon, deeper blue above.
func (st *site) sky(d [3]float64) RGB {
	e := math.Max(0, d[2])
	t := st.w.Light.SkyTint
	if st.night {
		return RGB{0.02, 0.02, 0.02}
	}
	k := 1.4 + 1.2*math.Pow(1-e, 3)
	return RGB{k * (0.8 + 0.2*t[0]), k * (0.55 + 0.45*t[1]), k * (0.35 + 0.65*t[2]*(0.6+0.4*(1-e)))}
}

// tAir is what a sight line from the camera meets first.
type tAir struct {
	kind uint8
	t    float64
	p    [3]float64
	n    [3]float64 // outward normal of the surface met
}

// traceAir follows a ray from o (above the water) along unit d to the
// first surface: fence or sky, the ground (deck at the deck height, lawn),
// the pool wall above the water, or the water surface.
func (st *site) traceAir(o, d [3]float64) tAir {
	y := st.yard
	// Leaving the yard through the fence line.
	tExit := math.Inf(1)
	if d[0] < 0 {
		tExit = math.Min(tExit, (y[0]-o[0])/d[0])
	} else if d[0] > 0 {
		tExit = math.Min(tExit, (y[1]-o[0])/d[0])
	}
	if d[1] < 0 {
		tExit = math.Min(tExit, (y[2]-o[1])/d[1])
	} else if d[1] > 0 {
		tExit = math.Min(tExit, (y[3]-o[1])/d[1])
	}
	tGround := math.Inf(1)
	if d[2] < 0 {
		tGround = (st.h - o[2]) / d[2]
	}
	if tExit < tGround {
		p := at(o, d, tExit)
		if p[2] < st.h+st.w.Site.FenceM {
			n := [3]float64{-sign(d[0]), 0, 0}
			if math.Abs(p[1]-y[2]) < 1e-6 || math.Abs(p[1]-y[3]) < 1e-6 {
				n = [3]float64{0, -sign(d[1]), 0}
			}
			return tAir{kind: hitFence, t: tExit, p: p, n: n}
		}
		return tAir{kind: hitSky, t: math.Inf(1)}
	}
	p := at(o, d, tGround)
	if p[0] < 0 || p[0] > st.L || p[1] < 0 || p[1] > st.W {
		return tAir{kind: hitGround, t: tGround, p: p, n: [3]float64{0, 0, 1}}
	}
	// Into the pool opening: the water at z = 0 unless a wall comes first.
	tw := -o[2] / d[2]
	s := at(o, d, tw)
	if s[0] >= 0 && s[0] <= st.L && s[1] >= 0 && s[1] <= st.W {
		return tAir{kind: hitWater, t: tw, p: s, n: [3]float64{0, 0, 1}}
	}
	tWall, n := st.wallHit(o, d, tGround)
	return tAir{kind: hitGround, t: tWall, p: at(o, d, tWall), n: n}
}

// wallHit returns where a ray inside the pool box (from parameter t0 on)
// meets a wall, and the wall's inward normal.
func (st *site) wallHit(o, d [3]float64, t0 float64) (float64, [3]float64) {
	best, n := math.Inf(1), [3]float64{0, 0, 1}
	try := func(t float64, nn [3]float64) {
		if t > t0-1e-9 && t < best {
			best, n = t, nn
		}
	}
	if d[0] < 0 {
		try(-o[0]/d[0], [3]float64{1, 0, 0})
	} else if d[0] > 0 {
		try((st.L-o[0])/d[0], [3]float64{-1, 0, 0})
	}
	if d[1] < 0 {
		try(-o[1]/d[1], [3]float64{0, 1, 0})
	} else if d[1] > 0 {
		try((st.W-o[1])/d[1], [3]float64{0, -1, 0})
	}
	if math.IsInf(best, 1) {
		best = t0
	}
	return best, n
}

// tUnder is what a refracted ray meets under the water.
type tUnder struct {
	wall bool
	p    [3]float64
	path float64 // length travelled in the water, m
}

// traceUnder follows a ray from the surface point s along unit d (d[2] <
// 0) to the floor or a wall.
func (st *site) traceUnder(s, d [3]float64) tUnder {
	tWall, _ := st.wallHit(s, d, 1e-9)
	tFloor := st.floorHit(s, d)
	if tWall < tFloor {
		return tUnder{wall: true, p: at(s, d, tWall), path: tWall}
	}
	return tUnder{p: at(s, d, tFloor), path: tFloor}
}

// floorHit returns the ray parameter at which s + t·d meets the floor
// z = -depth(x), solving on each linear piece of the depth profile.
func (st *site) floorHit(s, d [3]float64) float64 {
	dp := st.w.Site.Depth
	n := len(dp.X)
	best := math.Inf(1)
	// piece solves z = -(d0 + m·(x - x0)) for x in [lo, hi].
	piece := func(lo, hi, x0, d0, m float64) {
		den := d[2] + m*d[0]
		if math.Abs(den) < 1e-12 {
			return
		}
		t := -(s[2] + d0 + m*(s[0]-x0)) / den
		if t <= 1e-9 || t >= best {
			return
		}
		x := s[0] + t*d[0]
		if x >= lo-1e-9 && x <= hi+1e-9 {
			best = t
		}
	}
	piece(math.Inf(-1), dp.X[0], dp.X[0], dp.D[0], 0)
	for i := 1; i < n; i++ {
		m := (dp.D[i] - dp.D[i-1]) / (dp.X[i] - dp.X[i-1])
		piece(dp.X[i-1], dp.X[i], dp.X[i-1], dp.D[i-1], m)
	}
	piece(dp.X[n-1], math.Inf(1), dp.X[n-1], dp.D[n-1], 0)
	return best
}

func at(o, d [3]float64, t float64) [3]float64 {
	return [3]float64{o[0] + t*d[0], o[1] + t*d[1], o[2] + t*d[2]}
}

func sign(x float64) float64 {
	if x < 0 {
		return -1
	}
	return 1
}

// refract bends unit d (going down through the surface with upward unit
// normal n) into water by Snell's law, vector form.
func refract(d, n [3]float64, index float64) [3]float64 {
	eta := 1 / index
	cosI := -(d[0]*n[0] + d[1]*n[1] + d[2]*n[2])
	k := 1 - eta*eta*(1-cosI*cosI)
	if k < 0 {
		k = 0
	}
	f := eta*cosI - math.Sqrt(k)
	return [3]float64{eta*d[0] + f*n[0], eta*d[1] + f*n[1], eta*d[2] + f*n[2]}
}

// fresnel is the reflectance of the water surface for unpolarised light
// arriving at cosI from the normal (Fresnel equations, n = 1.333).
func fresnel(cosI float64) float64 {
	n := WaterIndex
	sinT2 := (1 - cosI*cosI) / (n * n)
	if sinT2 >= 1 {
		return 1
	}
	cosT := math.Sqrt(1 - sinT2)
	rs := (cosI - n*cosT) / (cosI + n*cosT)
	rp := (n*cosI - cosT) / (n*cosI + cosT)
	return (rs*rs + rp*rp) / 2
}
