// Package homography maps between camera pixels and the pool frame.
//
// It is plain Go with no cgo. Pixel coordinates have their origin at the
// top-left of the full-resolution camera frame, x to the right, y down.
// Pool coordinates are metres on the water surface, origin at the corner
// the installer names, x along the length and y along the width.
package homography

import (
	"errors"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// Point is a point in a plane: pixels or metres, as the caller's context says.
type Point struct {
	X, Y float64
}

// Sub returns p - q.
func (p Point) Sub(q Point) Point { return Point{p.X - q.X, p.Y - q.Y} }

// Dist returns the Euclidean distance between p and q.
func (p Point) Dist(q Point) float64 { return math.Hypot(p.X-q.X, p.Y-q.Y) }

// H is a 3×3 plane projective transform in row-major order, mapping
// homogeneous (x, y, 1) to (u, v, w) and so (x, y) to (u/w, v/w).
type H [9]float64

// Identity is the transform that maps every point to itself.
var Identity = H{1, 0, 0, 0, 1, 0, 0, 0, 1}

// Map applies h to p. The second result is false when p maps to infinity
// (p is on the horizon line of h).
func (h H) Map(p Point) (Point, bool) {
	w := h[6]*p.X + h[7]*p.Y + h[8]
	if math.Abs(w) < 1e-12 {
		return Point{}, false
	}
	return Point{
		X: (h[0]*p.X + h[1]*p.Y + h[2]) / w,
		Y: (h[3]*p.X + h[4]*p.Y + h[5]) / w,
	}, true
}

// W returns the homogeneous scale h gives p; its sign tells which side of
// the horizon line p lies on.
func (h H) W(p Point) float64 { return h[6]*p.X + h[7]*p.Y + h[8] }

// Mul returns the composition h·g: first g, then h.
func (h H) Mul(g H) H {
	var r H
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			var s float64
			for k := 0; k < 3; k++ {
				s += h[3*i+k] * g[3*k+j]
			}
			r[3*i+j] = s
		}
	}
	return r
}

// Normalized returns h scaled so that its last element is 1 (or, when that
// is zero, so that its Frobenius norm is 1).
func (h H) Normalized() H {
	s := h[8]
	if math.Abs(s) < 1e-15 {
		var n float64
		for _, v := range h {
			n += v * v
		}
		s = math.Sqrt(n)
	}
	if s == 0 {
		return h
	}
	var r H
	for i, v := range h {
		r[i] = v / s
	}
	return r
}

// Det returns the determinant of h.
func (h H) Det() float64 {
	return h[0]*(h[4]*h[8]-h[5]*h[7]) - h[1]*(h[3]*h[8]-h[5]*h[6]) + h[2]*(h[3]*h[7]-h[4]*h[6])
}

// ErrSingular is returned when a transform has no inverse.
var ErrSingular = errors.New("homography is singular")

// Inverse returns the inverse transform of h.
func (h H) Inverse() (H, error) {
	d := h.Det()
	scale := 0.0
	for _, v := range h {
		scale = math.Max(scale, math.Abs(v))
	}
	if scale == 0 || math.Abs(d) < 1e-12*scale*scale*scale {
		return H{}, ErrSingular
	}
	inv := H{
		(h[4]*h[8] - h[5]*h[7]) / d,
		(h[2]*h[7] - h[1]*h[8]) / d,
		(h[1]*h[5] - h[2]*h[4]) / d,
		(h[5]*h[6] - h[3]*h[8]) / d,
		(h[0]*h[8] - h[2]*h[6]) / d,
		(h[2]*h[3] - h[0]*h[5]) / d,
		(h[3]*h[7] - h[4]*h[6]) / d,
		(h[1]*h[6] - h[0]*h[7]) / d,
		(h[0]*h[4] - h[1]*h[3]) / d,
	}
	return inv.Normalized(), nil
}

// Solve returns the transform that maps each src point to the dst point of
// the same index, by the normalised direct linear transform (Hartley and
// Zisserman, Multiple View Geometry, 2nd ed., algorithm 4.2). With more than
// four pairs it is the algebraic least-squares fit. It checks only that the
// problem is well posed; ValidateCorners gives installers the detailed diagnosis.
func Solve(src, dst []Point) (H, error) {
	if len(src) != len(dst) {
		return H{}, fmt.Errorf("solve homography: %d source points but %d destination points", len(src), len(dst))
	}
	if len(src) < 4 {
		return H{}, fmt.Errorf("solve homography: need at least 4 point pairs, have %d", len(src))
	}
	ns, err := normalizer(src)
	if err != nil {
		return H{}, fmt.Errorf("solve homography: source points: %w", err)
	}
	nd, err := normalizer(dst)
	if err != nil {
		return H{}, fmt.Errorf("solve homography: destination points: %w", err)
	}
	n := len(src)
	a := mat.NewDense(2*n, 9, nil)
	for i := range src {
		x, _ := ns.Map(src[i])
		u, _ := nd.Map(dst[i])
		a.SetRow(2*i, []float64{-x.X, -x.Y, -1, 0, 0, 0, u.X * x.X, u.X * x.Y, u.X})
		a.SetRow(2*i+1, []float64{0, 0, 0, -x.X, -x.Y, -1, u.Y * x.X, u.Y * x.Y, u.Y})
	}
	// With exactly four pairs A is 8×9; pad with a zero row so the SVD
	// still yields the full 9×9 right singular basis.
	if a.RawMatrix().Rows < 9 {
		p := mat.NewDense(9, 9, nil)
		p.Slice(0, 2*n, 0, 9).(*mat.Dense).Copy(a)
		a = p
	}
	var svd mat.SVD
	if !svd.Factorize(a, mat.SVDFull) {
		return H{}, errors.New("solve homography: SVD did not converge")
	}
	var v mat.Dense
	svd.VTo(&v)
	var hn H
	for i := 0; i < 9; i++ {
		hn[i] = v.At(i, 8)
	}
	tdInv, err := nd.Inverse()
	if err != nil {
		return H{}, fmt.Errorf("solve homography: %w", err)
	}
	h := tdInv.Mul(hn).Mul(ns).Normalized()
	if _, err := h.Inverse(); err != nil {
		return H{}, fmt.Errorf("solve homography: result is degenerate (points collinear?): %w", err)
	}
	return h, nil
}

// normalizer returns the similarity that moves the centroid of pts to the
// origin and scales their mean distance from it to √2.
func normalizer(pts []Point) (H, error) {
	var cx, cy float64
	for _, p := range pts {
		cx += p.X
		cy += p.Y
	}
	cx /= float64(len(pts))
	cy /= float64(len(pts))
	var d float64
	for _, p := range pts {
		d += math.Hypot(p.X-cx, p.Y-cy)
	}
	d /= float64(len(pts))
	if d < 1e-12 {
		return H{}, errors.New("all points coincide")
	}
	s := math.Sqrt2 / d
	return H{s, 0, -s * cx, 0, s, -s * cy, 0, 0, 1}, nil
}

// Reprojection returns the root-mean-square and the largest distance, in
// destination units, between h(src[i]) and dst[i].
func Reprojection(h H, src, dst []Point) (rms, worst float64) {
	for i := range src {
		p, ok := h.Map(src[i])
		if !ok {
			return math.Inf(1), math.Inf(1)
		}
		d := p.Dist(dst[i])
		rms += d * d
		worst = math.Max(worst, d)
	}
	return math.Sqrt(rms / float64(len(src))), worst
}
