package synth

import "math"

// lensCam is a posed camera with a distorting lens: world (pool metres) to
// raw image pixels and back.
type lensCam struct {
	r [3][3]float64 // rows: right, down, forward (world → camera)
	c [3]float64    // centre, world metres
	l Lens
	// fold is the undistorted radius (normalised) beyond which the
	// distortion polynomial stops growing; points past it are not imaged.
	fold float64
}

func newLensCam(p Pose, l Lens) lensCam {
	base := newCamera(p, 2, 2) // only its rotation is used
	right, down, fwd := base.r[0], base.r[1], base.r[2]
	if p.RollDeg != 0 {
		cr, sr := math.Cos(deg(p.RollDeg)), math.Sin(deg(p.RollDeg))
		for i := 0; i < 3; i++ {
			right[i], down[i] = cr*base.r[0][i]+sr*base.r[1][i], -sr*base.r[0][i]+cr*base.r[1][i]
		}
	}
	c := lensCam{r: [3][3]float64{right, down, fwd}, c: [3]float64{p.X, p.Y, p.Height}, l: l}
	c.fold = c.foldRadius()
	return c
}

// radial returns the radial factor a(r²).
func (c lensCam) radial(r2 float64) float64 {
	d := c.l.Dist
	return 1 + r2*(d[0]+r2*(d[1]+r2*d[4]))
}

// foldRadius finds the first undistorted radius where r·a(r²) stops
// increasing (searching up to 20, far beyond any image).
func (c lensCam) foldRadius() float64 {
	d := c.l.Dist
	prev := 0.0
	for r := 0.005; r < 20; r += 0.005 {
		r2 := r * r
		v := r * (1 + r2*(d[0]+r2*(d[1]+r2*d[4])))
		if v <= prev {
			return r - 0.005
		}
		prev = v
	}
	return 20
}

// distort maps normalised pinhole coordinates to normalised distorted ones
// (OpenCV's model, see Lens).
func (c lensCam) distort(x, y float64) (float64, float64) {
	d := c.l.Dist
	r2 := x*x + y*y
	a := c.radial(r2)
	return a*x + 2*d[2]*x*y + d[3]*(r2+2*x*x), a*y + d[2]*(r2+2*y*y) + 2*d[3]*x*y
}

// undistort inverts distort by Newton's method, starting from the radial
// inverse; ok is false outside the imaged zone.
func (c lensCam) undistort(xd, yd float64) (x, y float64, ok bool) {
	rd := math.Hypot(xd, yd)
	if rd < 1e-15 {
		return xd, yd, true
	}
	// Radial-only inverse by bisection on [0, fold].
	lo, hi := 0.0, c.fold
	if hi*c.radial(hi*hi) < rd {
		return 0, 0, false
	}
	for i := 0; i < 60; i++ {
		m := (lo + hi) / 2
		if m*c.radial(m*m) < rd {
			lo = m
		} else {
			hi = m
		}
	}
	s := (lo + hi) / 2 / rd
	return c.newton(xd, yd, xd*s, yd*s, 20)
}

// newton refines (x, y) towards distort(x, y) = (xd, yd) for at most n
// steps; ok is false when it did not converge inside the imaged zone.
func (c lensCam) newton(xd, yd, x, y float64, n int) (float64, float64, bool) {
	d := c.l.Dist
	conv := false
	for i := 0; i < n; i++ {
		fx, fy := c.distort(x, y)
		ex, ey := fx-xd, fy-yd
		if math.Abs(ex)+math.Abs(ey) < 1e-13 {
			conv = true
			break
		}
		r2 := x*x + y*y
		a := c.radial(r2)
		da := d[0] + 2*d[1]*r2 + 3*d[4]*r2*r2 // da/d(r²)
		j00 := a + 2*x*x*da + 2*d[2]*y + 6*d[3]*x
		j01 := 2*x*y*da + 2*d[2]*x + 2*d[3]*y
		j10 := 2*x*y*da + 2*d[2]*x + 2*d[3]*y
		j11 := a + 2*y*y*da + 6*d[2]*y + 2*d[3]*x
		det := j00*j11 - j01*j10
		if math.Abs(det) < 1e-12 {
			break
		}
		x -= (j11*ex - j01*ey) / det
		y -= (-j10*ex + j00*ey) / det
	}
	return x, y, conv && x*x+y*y < c.fold*c.fold
}

// toCam returns camera coordinates of a world point.
func (c lensCam) toCam(x, y, z float64) [3]float64 {
	d := [3]float64{x - c.c[0], y - c.c[1], z - c.c[2]}
	var q [3]float64
	for i := 0; i < 3; i++ {
		q[i] = c.r[i][0]*d[0] + c.r[i][1]*d[1] + c.r[i][2]*d[2]
	}
	return q
}

// project maps a world point to raw image pixels; ok is false behind the
// camera or beyond the lens's imaged zone.
func (c lensCam) project(x, y, z float64) (u, v float64, ok bool) {
	q := c.toCam(x, y, z)
	if q[2] <= 1e-9 {
		return 0, 0, false
	}
	px, py := q[0]/q[2], q[1]/q[2]
	if px*px+py*py >= c.fold*c.fold*0.98 {
		return 0, 0, false
	}
	xd, yd := c.distort(px, py)
	return c.l.Fx*xd + c.l.Cx, c.l.Fy*yd + c.l.Cy, true
}

// pinhole maps a world point to the undistorted (ideal pinhole) pixels of
// the same K.
func (c lensCam) pinhole(x, y, z float64) (u, v float64, ok bool) {
	q := c.toCam(x, y, z)
	if q[2] <= 1e-9 {
		return 0, 0, false
	}
	return c.l.Fx*q[0]/q[2] + c.l.Cx, c.l.Fy*q[1]/q[2] + c.l.Cy, true
}

// ray returns the unit world direction of the sight line through raw pixel
// (u, v); ok is false outside the imaged zone.
func (c lensCam) ray(u, v float64) ([3]float64, bool) {
	x, y, ok := c.undistort((u-c.l.Cx)/c.l.Fx, (v-c.l.Cy)/c.l.Fy)
	if !ok {
		return [3]float64{}, false
	}
	var d [3]float64
	for i := 0; i < 3; i++ {
		d[i] = c.r[0][i]*x + c.r[1][i]*y + c.r[2][i]
	}
	n := math.Sqrt(d[0]*d[0] + d[1]*d[1] + d[2]*d[2])
	return [3]float64{d[0] / n, d[1] / n, d[2] / n}, true
}

// maxRadius returns the largest distorted radius of the image corners and
// the largest the lens can image; ok is false when the image reaches past
// the fold.
func (c lensCam) maxRadius(w, h int) (corner, limit float64, ok bool) {
	for _, p := range [][2]float64{{0, 0}, {float64(w), 0}, {0, float64(h)}, {float64(w), float64(h)}} {
		xd, yd := (p[0]-c.l.Cx)/c.l.Fx, (p[1]-c.l.Cy)/c.l.Fy
		corner = math.Max(corner, math.Hypot(xd, yd))
	}
	limit = c.fold * c.radial(c.fold*c.fold)
	// Tangential terms move points by a little; keep a margin.
	return corner, limit, corner < limit*0.97
}

// hfov returns the horizontal field of view through the principal point's
// row, degrees, measured on the distorted image (edge to edge).
func (c lensCam) hfov(w int) float64 {
	xl, _, _ := c.undistort((0-c.l.Cx)/c.l.Fx, 0)
	xr, _, _ := c.undistort((float64(w)-c.l.Cx)/c.l.Fx, 0)
	return (math.Atan(-xl) + math.Atan(xr)) * 180 / math.Pi
}
