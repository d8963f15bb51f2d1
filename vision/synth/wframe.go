package synth

import (
	"fmt"
	"image"
	"math"

	"gocv.io/x/gocv"
)

// frame renders frame idx into r.out and returns its truth.
func (r *wRenderer) frame(idx int) (FrameTruth, error) {
	t := float64(idx) / r.s.FPS
	r.t = t
	ft := FrameTruth{Frame: idx, T: round6(t)}
	fault := r.faultAt(t)
	if fault != nil {
		ft.Fault = fault.Kind
	}
	// Objects first: the truth needs them even when a fault hides them.
	r.clearDirty()
	r.objs.prims = r.objs.prims[:0]
	r.objs.objs = r.objs.objs[:0]
	for k, in := range r.s.Intruders {
		cs := r.addChild(in, r.entries[k], t)
		if !cs.present || k > 0 {
			continue
		}
		occ := r.occupation(cs)
		if cs.inWater {
			ft.Intruder = occ
		} else {
			ft.Outside = occ
		}
	}
	if fault != nil {
		return ft, r.applyFault(idx, t, fault)
	}
	r.frozenFrom = -1
	r.heldRaw = r.heldRaw[:0]
	for _, l := range r.w.Leaves {
		r.addLeaf(l, t)
	}
	for _, b := range r.w.Birds {
		r.addBird(b, t)
	}
	for _, wk := range r.w.Walkers {
		r.addWalker(wk, t)
	}
	r.waves.update(t, r.w.Wind.Slope, r.w.Water.Caustics > 0 && !r.w.Light.Night)
	r.gust.update(r.w.Wind, t, r.poolMid)
	r.rasterAll()
	if r.gain == 0 {
		// The first frame sets the exposure: measure, then draw.
		r.gain = 1
		r.pass(t)
		lum := r.lumSum / math.Max(1, float64(r.lumN))
		r.lumRef = math.Max(lum, 1e-4)
		r.gainRef = math.Min(r.exposureTarget()/r.lumRef, 80)
		r.gain = r.gainRef
	}
	r.pass(t)
	r.updateExposure(idx)
	return ft, nil
}

// exposureTarget is the mean linear luminance auto exposure aims for.
func (r *wRenderer) exposureTarget() float64 {
	if r.w.Light.Night {
		return 0.08
	}
	return 0.2
}

// updateExposure moves the gain towards undoing ExposureComp of the change
// in scene light since the first frame, with time constant ExposureTau,
// for the time from the last frame drawn (frames may be skipped, as for a
// contact sheet).
func (r *wRenderer) updateExposure(idx int) {
	l := r.w.Light
	lum := math.Max(r.lumSum/math.Max(1, float64(r.lumN)), 1e-4)
	want := r.gainRef * math.Pow(r.lumRef/lum, l.ExposureComp)
	want = math.Min(want, r.gainRef*4)
	steps := float64(max(1, idx-r.lastIdx))
	a := 1 - math.Exp(-steps/(r.s.FPS*math.Max(l.ExposureTau, 0.05)))
	r.gain += (want - r.gain) * a
	r.lastIdx = idx
}

func (r *wRenderer) occupation(cs childState) *Occupation {
	occ := &Occupation{X: round6(cs.x), Y: round6(cs.y)}
	sc := &r.objs
	ob := sc.objs[len(sc.objs)-1]
	_, _, area, _ := sc.footprint(ob.from, ob.to, r.s.PoolLength, r.s.PoolWidth)
	occ.Area = round6(area)
	if cs.depth > 0 {
		ax, ay, err := r.s.Apparent(cs.x, cs.y, cs.depth)
		if err == nil {
			occ.X, occ.Y = round6(ax), round6(ay)
		}
		occ.Under = &Submerged{X: round6(cs.x), Y: round6(cs.y), Depth: round6(cs.depth)}
	}
	return occ
}

func (r *wRenderer) faultAt(t float64) *Fault {
	for k := range r.w.Faults {
		f := &r.w.Faults[k]
		if t >= f.From && t < f.To {
			return f
		}
	}
	return nil
}

// applyFault draws a faulty picture into r.out: black (a covered or dead
// sensor: a few grey levels of noise), noise (a failing sensor or cable:
// coarse random snow) or frozen (the last good picture held; at each key
// frame, every GOP frames of the clip, the camera re-encodes it, so it
// changes slightly then and only then).
func (r *wRenderer) applyFault(idx int, t float64, f *Fault) error {
	off := r.rng.Intn(65536)
	nk, z := r.nk[off:], &r.z
	switch f.Kind {
	case FaultBlack:
		for i := range r.out {
			r.out[i] = clampByte(4 + 1.5*z[nk[i]])
		}
	case FaultNoise:
		for i := range r.out {
			r.out[i] = clampByte(128 + 70*z[nk[i]] + 30*z[nk[i/3*3+1]])
		}
	case FaultFrozen:
		if r.frozenFrom < 0 {
			r.frozenFrom = idx
			r.heldRaw = append(r.heldRaw[:0], r.out...)
			return nil
		}
		gop := r.w.Encoding.GOP
		if gop < 1 {
			gop = 1
		}
		// The camera's encoder starts a group of pictures every GOP frames
		// (as the clip's own encoder does).
		if idx%gop == 0 {
			return r.reencode(50 + r.rng.Intn(45))
		}
	}
	return nil
}

// reencode replaces r.out with the held picture passed through a JPEG
// encoder at quality q.
func (r *wRenderer) reencode(q int) error {
	m, err := gocv.NewMatFromBytes(r.H, r.W, gocv.MatTypeCV8UC3, r.heldRaw)
	if err != nil {
		return fmt.Errorf("frozen picture: %w", err)
	}
	defer m.Close()
	buf, err := gocv.IMEncodeWithParams(gocv.JPEGFileExt, m, []int{gocv.IMWriteJpegQuality, q})
	if err != nil {
		return fmt.Errorf("frozen picture: encode: %w", err)
	}
	defer buf.Close()
	dec, err := gocv.IMDecode(buf.GetBytes(), gocv.IMReadColor)
	if err != nil {
		return fmt.Errorf("frozen picture: decode: %w", err)
	}
	defer dec.Close()
	b, err := dec.DataPtrUint8()
	if err != nil || len(b) != len(r.out) {
		return fmt.Errorf("frozen picture: decoded %d bytes, want %d", len(b), len(r.out))
	}
	copy(r.out, b)
	return nil
}

func clampByte(v float32) uint8 {
	if v <= 0 {
		return 0
	}
	if v >= 255 {
		return 255
	}
	return uint8(v + 0.5)
}

// clearDirty resets the object layer and shadows where the last frame
// drew them.
func (r *wRenderer) clearDirty() {
	for _, b := range r.dirty {
		for v := b.Min.Y; v < b.Max.Y; v++ {
			row := v * r.W
			for u := b.Min.X; u < b.Max.X; u++ {
				i := row + u
				r.objM[i] = objNone
				r.objA[i] = 0
				r.shade[i] = 255
				r.stir[i] = 0
			}
		}
	}
	r.dirty = r.dirty[:0]
}

// rasterAll draws the shadows, then the objects from far to near.
func (r *wRenderer) rasterAll() {
	sc := &r.objs
	sc.order = sc.order[:0]
	for k := range sc.objs {
		sc.order = append(sc.order, k)
	}
	for a := 1; a < len(sc.order); a++ {
		for b := a; b > 0 && sc.objs[sc.order[b]].dist > sc.objs[sc.order[b-1]].dist; b-- {
			sc.order[b], sc.order[b-1] = sc.order[b-1], sc.order[b]
		}
	}
	if !r.w.Light.Night && r.w.Light.Sun > 0.3 && r.sunDir[2] > 0.05 {
		for _, k := range sc.order {
			if sc.objs[k].shadow {
				r.rasterShadow(&sc.objs[k])
			}
		}
	}
	for _, k := range sc.order {
		r.raster(&sc.objs[k])
	}
}

// rasterShadow marks the ground and water pixels whose line to the sun
// the object blocks.
func (r *wRenderer) rasterShadow(ob *object) {
	sc := &r.objs
	x0, y0, x1, y1 := math.Inf(1), math.Inf(1), math.Inf(-1), math.Inf(-1)
	for k := ob.from; k < ob.to; k++ {
		p := &sc.prims[k]
		for c := 0; c < 8; c++ {
			q := [3]float64{p.c[0] + p.ext[0]*float64(2*(c&1)-1), p.c[1] + p.ext[1]*float64(2*(c>>1&1)-1), p.c[2] + p.ext[2]*float64(2*(c>>2&1)-1)}
			for _, z := range []float64{0, r.st.h} {
				// The corner's shadow and the point below it bound the
				// shadow on this plane.
				k := math.Max(0, q[2]-z) / r.sunDir[2]
				for _, f := range []float64{0, k} {
					u, v, ok := r.cam.project(q[0]-f*r.sunDir[0], q[1]-f*r.sunDir[1], z)
					if !ok {
						continue
					}
					x0, x1 = math.Min(x0, u), math.Max(x1, u)
					y0, y1 = math.Min(y0, v), math.Max(y1, v)
				}
			}
		}
	}
	if math.IsInf(x0, 1) {
		return
	}
	box := image.Rect(int(x0)-2, int(y0)-2, int(x1)+3, int(y1)+3).Intersect(image.Rect(0, 0, r.W, r.H))
	if box.Empty() {
		return
	}
	cam := r.cam.c
	for v := box.Min.Y; v < box.Max.Y; v++ {
		for u := box.Min.X; u < box.Max.X; u++ {
			i := v*r.W + u
			z := 0.0
			switch r.class[i] {
			case pxGround:
				z = r.st.h
			case pxWater:
			default:
				continue
			}
			d, ok := r.rayAt(float64(u), float64(v))
			if !ok || d[2] >= 0 {
				continue
			}
			g := at(cam, d, (z-cam[2])/d[2])
			for k := ob.from; k < ob.to; k++ {
				if _, _, hit := hitPrim(&sc.prims[k], g, r.sunDir); hit {
					r.shade[i] = 8
					break
				}
			}
		}
	}
	r.dirty = append(r.dirty, box)
}

// raster draws one object into the object layer with four samples per
// pixel.
func (r *wRenderer) raster(ob *object) {
	if ob.box.Empty() {
		return
	}
	for v := ob.box.Min.Y; v < ob.box.Max.Y; v++ {
		for u := ob.box.Min.X; u < ob.box.Max.X; u++ {
			i := v*r.W + u
			cls := r.class[i]
			var cov, covUnder float64
			var col [3]float64
			for _, o := range subOffsets {
				d, ok := r.rayAt(float64(u)+o[0], float64(v)+o[1])
				if !ok {
					continue
				}
				c, a, under := r.shadeRay(ob, d, cls, u, v)
				if a <= 0 {
					continue
				}
				cov += a / 4
				if under {
					covUnder += a / 4
				}
				for k := range col {
					col[k] += c[k] * a / 4
				}
			}
			if cov <= 0 {
				continue
			}
			mode := objAbove
			vig := float32(r.vignette(float64(u), float64(v)))
			if covUnder*2 > cov && cls == pxWater {
				mode, vig = objUnder, 1
			}
			r.objM[i] = mode
			r.objA[i] = float32(cov)
			for k := range col {
				r.objC[3*i+k] = float32(col[k]/cov) * vig
			}
		}
	}
	r.dirty = append(r.dirty, ob.box)
}

// shadeRay returns the colour an object shows along sight line d in pixel
// (u, v), its weight (0 when missed) and whether it is seen through the
// water.
func (r *wRenderer) shadeRay(ob *object, d [3]float64, cls uint8, u, v int) ([3]float64, float64, bool) {
	sc := &r.objs
	o := r.cam.c
	tLimit := math.Inf(1)
	if d[2] < 0 {
		switch cls {
		case pxWater:
			tLimit = -o[2] / d[2]
		case pxGround:
			tLimit = (r.st.h - o[2]) / d[2]
		}
	}
	best, bk := tLimit, -1
	var bn [3]float64
	pt := image.Pt(u, v)
	for k := ob.from; k < ob.to; k++ {
		p := &sc.prims[k]
		if !pt.In(p.box) {
			continue
		}
		if t, n, hit := hitPrim(p, o, d); hit && t < best {
			best, bk, bn = t, k, n
		}
	}
	if bk >= 0 {
		return r.lightSurface(ob, &sc.prims[bk], at(o, d, best), bn, false, 0), 1, false
	}
	if cls != pxWater || d[2] >= 0 {
		return [3]float64{}, 0, false
	}
	// Through the surface, bent by Snell's law on the rippled normal.
	s := at(o, d, tLimit)
	ti := tileAt(s[0], s[1])
	g := r.gust.at(s[0], s[1]) * r.w.Wind.Slope * (1 + float64(r.stir[v*r.W+u])/32)
	sx, sy := float64(bilinear(r.waves.sx, ti))*g, float64(bilinear(r.waves.sy, ti))*g
	nl := math.Sqrt(sx*sx + sy*sy + 1)
	td := refract(d, [3]float64{-sx / nl, -sy / nl, 1 / nl}, WaterIndex)
	best, bk = math.Inf(1), -1
	for k := ob.from; k < ob.to; k++ {
		p := &sc.prims[k]
		if !pt.In(p.box) {
			continue
		}
		if t, n, hit := hitPrim(p, s, td); hit && t < best && s[2]+t*td[2] < 0 {
			best, bk, bn = t, k, n
		}
	}
	if bk < 0 {
		return [3]float64{}, 0, false
	}
	hp := at(s, td, best)
	a := ob.under
	if a <= 0 {
		a = math.Exp(-0.5 * -hp[2])
	}
	return r.lightSurface(ob, &sc.prims[bk], hp, bn, true, best), a, true
}

// lightSurface returns the radiance of an object's surface point: sun and
// sky by day (dimmed and tinted by the water above it when under), the
// infrared illuminator and pool lamps by night.
func (r *wRenderer) lightSurface(ob *object, p *prim, hp, n [3]float64, under bool, path float64) [3]float64 {
	l := r.w.Light
	var out [3]float64
	cam := r.cam.c
	if l.Night {
		e := float64(r.amb[0]) + r.irAt(cam, hp, n)
		if under {
			lit, glow := r.lampsAt(hp, hp)
			e = float64(r.amb[0]) + lit + 0.3*glow + r.irAt(cam, hp, n)*math.Exp(-3*path)
		}
		for k := range out {
			out[k] = float64(p.col[k]) * e
		}
		return out
	}
	cosS := math.Max(0, n[0]*r.sunDir[0]+n[1]*r.sunDir[1]+n[2]*r.sunDir[2])
	for k := range out {
		out[k] = float64(p.col[k]) * (float64(r.amb[k])*(0.6+0.4*math.Max(0, n[2])) + float64(r.sunC[k])*cosS*ob.sun)
	}
	if under {
		wl := r.w.Water
		L := path - hp[2]*1.1
		for k := range out {
			out[k] *= math.Exp(-(wl.Absorb[k] + wl.Turbidity) * L)
		}
	}
	return out
}

// toneIdx returns the row of the tone-and-noise table for linear light c
// at gain gs (·1024).
func toneIdx(c, gs float32) int {
	x := int(c * gs)
	if x > 4095 {
		x = 4095
	} else if x < 0 {
		x = 0
	}
	return x << 4
}

// pass draws every pixel from its table for time t into r.out.
func (r *wRenderer) pass(t float64) {
	W := r.W
	n := len(r.class)
	gain := float32(r.gain)
	slope := float32(r.w.Wind.Slope)
	sxT, syT, caus := r.waves.sx, r.waves.sy, r.waves.caus
	gl := &r.gust.g
	var cl []float32
	var ox, oy int
	if r.clouds != nil {
		cl = r.clouds.sun
		ox, oy = r.clouds.shift(t)
	}
	sunW := float32(r.sunW)
	sunI := float32(1)
	sc, amb := r.sunC, r.amb
	night := r.w.Light.Night
	noff := r.rng.Intn(65536)
	nk := r.nk[noff : noff+3*n]
	class, abase := r.class, r.abase
	objM, objA, objC, shade, stir := r.objM, r.objA, r.objC, r.shade, r.stir
	tq, out := r.toneNoise, r.out
	gs := gain * 1024
	var lumSum float64
	lumN := 0
	// glitter: exp(−q) for q = |slope − glint slope|²/σ², σ = 0.03.
	const invSig2 = 1 / (0.03 * 0.03)
	glit := &r.glit

	for k := range r.wp {
		p := &r.wp[k]
		i := int(p.i)
		gg := gl[p.gust] * (1 + float32(stir[i])*(1.0/32))
		g := gg * slope
		sx, sy := bilinear(sxT, p.tile)*g, bilinear(syT, p.tile)*g
		du := int(sx*p.m[0]+sy*p.m[1]+8.5) - 8
		dv := int(sx*p.m[2]+sy*p.m[3]+8.5) - 8
		if du < -8 {
			du = -8
		} else if du > 8 {
			du = 8
		}
		if dv < -8 {
			dv = -8
		} else if dv > 8 {
			dv = 8
		}
		j := i + dv*W + du
		if uint(j) >= uint(n) || class[j] != pxWater {
			j = i
		}
		sun := float32(1)
		if cl != nil {
			sun = cl[((int(p.cy)+oy)&cloudMask)*cloudN+((int(p.cx)+ox)&cloudMask)]
		}
		sun *= float32(shade[i]) * (1.0 / 255)
		cc := 1 + p.camp*gg*(bilinear(caus, p.caus)-1)
		if cc < 0 {
			cc = 0
		}
		sd := sunW * sun
		ab := abase[3*j : 3*j+3 : 3*j+3]
		u0 := p.trans*ab[0]*(amb[0]+p.lit+sc[0]*sd*cc) + p.scat[0]*(amb[0]+p.glow+sc[0]*sd)
		u1 := p.trans*ab[1]*(amb[1]+p.lit+sc[1]*sd*cc) + p.scat[1]*(amb[1]+p.glow+sc[1]*sd)
		u2 := p.trans*ab[2]*(amb[2]+p.lit+sc[2]*sd*cc) + p.scat[2]*(amb[2]+p.glow+sc[2]*sd)
		m := objM[i]
		if m == objUnder {
			a := objA[i]
			oc := objC[3*i : 3*i+3 : 3*i+3]
			u0 = u0*(1-a) + oc[0]*a*p.trans
			u1 = u1*(1-a) + oc[1]*a*p.trans
			u2 = u2*(1-a) + oc[2]*a*p.trans
		}
		rf := 1 + sx*p.kv[0] + sy*p.kv[1]
		if rf < 0.2 {
			rf = 0.2
		}
		var gv float32
		if p.gamp > 0 && sun > 0.05 {
			dx, dy := sx-p.gs[0], sy-p.gs[1]
			if q := (dx*dx + dy*dy) * invSig2; q < 8 {
				gv = p.gamp * sun * glit[int(q*32)]
			}
		}
		f0 := u0 + p.sky[0]*rf + gv*sc[0]
		f1 := u1 + p.sky[1]*rf + gv*sc[1]
		f2 := u2 + p.sky[2]*rf + gv*sc[2]
		if m == objAbove {
			a := objA[i]
			oc := objC[3*i : 3*i+3 : 3*i+3]
			f0 = f0*(1-a) + oc[0]*a
			f1 = f1*(1-a) + oc[1]*a
			f2 = f2*(1-a) + oc[2]*a
		}
		if i&7 == 0 {
			lumSum += float64(0.114*f0 + 0.587*f1 + 0.299*f2)
			lumN++
		}
		o := 3 * i
		if night {
			k := toneIdx(0.114*f0+0.587*f1+0.299*f2, gs) | int(nk[o])
			out[o], out[o+1], out[o+2] = tq[k], tq[k], tq[k]
		} else {
			out[o] = tq[toneIdx(f0, gs)|int(nk[o])]
			out[o+1] = tq[toneIdx(f1, gs)|int(nk[o+1])]
			out[o+2] = tq[toneIdx(f2, gs)|int(nk[o+2])]
		}
	}
	for k := range r.gp {
		p := &r.gp[k]
		i := int(p.i)
		var s float32
		if p.sun > 0 {
			s = p.sun * sunI * float32(shade[i]) * (1.0 / 255)
			if cl != nil && p.cx >= 0 {
				s *= cl[((int(p.cy)+oy)&cloudMask)*cloudN+((int(p.cx)+ox)&cloudMask)]
			}
		}
		f0 := p.alb[0] * (amb[0] + p.lit + sc[0]*s)
		f1 := p.alb[1] * (amb[1] + p.lit + sc[1]*s)
		f2 := p.alb[2] * (amb[2] + p.lit + sc[2]*s)
		if objM[i] != objNone {
			a := objA[i]
			oc := objC[3*i : 3*i+3 : 3*i+3]
			f0 = f0*(1-a) + oc[0]*a
			f1 = f1*(1-a) + oc[1]*a
			f2 = f2*(1-a) + oc[2]*a
		}
		if i&7 == 0 {
			lumSum += float64(0.114*f0 + 0.587*f1 + 0.299*f2)
			lumN++
		}
		o := 3 * i
		if night {
			k := toneIdx(0.114*f0+0.587*f1+0.299*f2, gs) | int(nk[o])
			out[o], out[o+1], out[o+2] = tq[k], tq[k], tq[k]
		} else {
			out[o] = tq[toneIdx(f0, gs)|int(nk[o])]
			out[o+1] = tq[toneIdx(f1, gs)|int(nk[o+1])]
			out[o+2] = tq[toneIdx(f2, gs)|int(nk[o+2])]
		}
	}
	r.lumSum, r.lumN = lumSum, lumN
}
