package homography

import (
	"fmt"
	"math"
)

// Lens models.
const (
	// LensPinhole is the Brown–Conrady model OpenCV's calibrateCamera
	// fits: radial k1, k2, k3 and tangential p1, p2, coefficients in the
	// order k1, k2, p1, p2, k3 (k3 may be left out).
	LensPinhole = "pinhole"
	// LensFisheye is the equidistant model of OpenCV's fisheye module,
	// θd = θ(1 + k1θ² + k2θ⁴ + k3θ⁶ + k4θ⁸), coefficients k1…k4.
	LensFisheye = "fisheye"
)

// Lens is a camera's intrinsics and lens distortion, in pixels of the
// full-resolution frame (origin top-left, x right, y down).
type Lens struct {
	Model string // LensPinhole or LensFisheye
	K     Intrinsics
	// Dist are the distortion coefficients in OpenCV's order for Model.
	Dist []float64
}

// Validate reports whether the lens can be used to undistort points.
func (l Lens) Validate() error {
	if !(l.K.Fx > 0) || !(l.K.Fy > 0) || math.IsInf(l.K.Fx, 0) || math.IsInf(l.K.Fy, 0) ||
		math.IsNaN(l.K.Cx) || math.IsNaN(l.K.Cy) || math.IsInf(l.K.Cx, 0) || math.IsInf(l.K.Cy, 0) {
		return fmt.Errorf("lens: intrinsics fx %v, fy %v, cx %v, cy %v: need positive finite focal lengths and a finite principal point (pixels)", l.K.Fx, l.K.Fy, l.K.Cx, l.K.Cy)
	}
	for i, d := range l.Dist {
		if math.IsNaN(d) || math.IsInf(d, 0) {
			return fmt.Errorf("lens: distortion coefficient %d is %v; give finite numbers", i, d)
		}
	}
	switch l.Model {
	case LensPinhole:
		if n := len(l.Dist); n != 4 && n != 5 {
			return fmt.Errorf("lens: pinhole model takes 4 or 5 distortion coefficients (k1, k2, p1, p2[, k3]), have %d", n)
		}
	case LensFisheye:
		if n := len(l.Dist); n != 4 {
			return fmt.Errorf("lens: fisheye model takes 4 distortion coefficients (k1, k2, k3, k4), have %d", n)
		}
	default:
		return fmt.Errorf("lens: model %q; want %q or %q", l.Model, LensPinhole, LensFisheye)
	}
	return nil
}

func (l Lens) coef(i int) float64 {
	if i < len(l.Dist) {
		return l.Dist[i]
	}
	return 0
}

// distortNorm applies the distortion to normalised image coordinates
// (x/z, y/z of the camera ray).
func (l Lens) distortNorm(x, y float64) (float64, float64) {
	if l.Model == LensFisheye {
		r := math.Hypot(x, y)
		if r < 1e-15 {
			return x, y
		}
		th := math.Atan(r)
		t2 := th * th
		thd := th * (1 + t2*(l.coef(0)+t2*(l.coef(1)+t2*(l.coef(2)+t2*l.coef(3)))))
		return x * thd / r, y * thd / r
	}
	k1, k2, p1, p2, k3 := l.coef(0), l.coef(1), l.coef(2), l.coef(3), l.coef(4)
	r2 := x*x + y*y
	rad := 1 + r2*(k1+r2*(k2+r2*k3))
	return x*rad + 2*p1*x*y + p2*(r2+2*x*x), y*rad + p1*(r2+2*y*y) + 2*p2*x*y
}

// Distort maps an ideal (undistorted) pixel to where the lens puts it in
// the recorded frame. Both are pixels with the same intrinsics K.
func (l Lens) Distort(p Point) Point {
	x, y := (p.X-l.K.Cx)/l.K.Fx, (p.Y-l.K.Cy)/l.K.Fy
	xd, yd := l.distortNorm(x, y)
	return Point{xd*l.K.Fx + l.K.Cx, yd*l.K.Fy + l.K.Cy}
}

// Undistort maps a recorded pixel to the ideal pinhole pixel with the same
// intrinsics K, inverting Distort. The pinhole model is inverted by
// Newton's method on the 2×2 Jacobian (started from the fixed-point guess
// OpenCV's undistortPoints uses), the fisheye model by Newton's method on
// the angle. It fails when the iteration does not converge, which happens
// only for points far outside the region the coefficients were fitted on.
func (l Lens) Undistort(p Point) (Point, error) {
	xd, yd := (p.X-l.K.Cx)/l.K.Fx, (p.Y-l.K.Cy)/l.K.Fy
	var x, y float64
	var err error
	if l.Model == LensFisheye {
		x, y, err = l.undistortFisheye(xd, yd)
	} else {
		x, y, err = l.undistortPinhole(xd, yd)
	}
	if err != nil {
		return Point{}, fmt.Errorf("undistort pixel (%.1f, %.1f): %w", p.X, p.Y, err)
	}
	return Point{x*l.K.Fx + l.K.Cx, y*l.K.Fy + l.K.Cy}, nil
}

// undistortTol is the convergence tolerance in normalised coordinates:
// 1e-12 of the focal length is far below a pixel.
const undistortTol = 1e-12

func (l Lens) undistortPinhole(xd, yd float64) (float64, float64, error) {
	x, y := xd, yd
	for i := 0; i < 50; i++ {
		fx, fy := l.distortNorm(x, y)
		ex, ey := fx-xd, fy-yd
		// Numerical Jacobian of distortNorm at (x, y).
		const h = 1e-7
		ax, ay := l.distortNorm(x+h, y)
		bx, by := l.distortNorm(x, y+h)
		j00, j10 := (ax-fx)/h, (ay-fy)/h
		j01, j11 := (bx-fx)/h, (by-fy)/h
		det := j00*j11 - j01*j10
		if math.Hypot(ex, ey) < undistortTol {
			// A root where the model has folded over (the image flipped,
			// or the point on the far side of the centre) is not the
			// camera's ray: the lens never drew that pixel.
			if det <= 0 || x*xd+y*yd < 0 {
				break
			}
			return x, y, nil
		}
		if math.Abs(det) < 1e-12 {
			return 0, 0, fmt.Errorf("distortion model folds over here (Jacobian singular); the point is outside the calibrated field of view")
		}
		x -= (j11*ex - j01*ey) / det
		y -= (-j10*ex + j00*ey) / det
		if math.IsNaN(x) || math.IsNaN(y) || math.Abs(x) > 1e3 || math.Abs(y) > 1e3 {
			break
		}
	}
	return 0, 0, fmt.Errorf("inverse distortion did not converge; the point is outside the calibrated field of view")
}

func (l Lens) undistortFisheye(xd, yd float64) (float64, float64, error) {
	thd := math.Hypot(xd, yd)
	if thd < 1e-15 {
		return xd, yd, nil
	}
	k1, k2, k3, k4 := l.coef(0), l.coef(1), l.coef(2), l.coef(3)
	th := thd
	for i := 0; i < 50; i++ {
		t2 := th * th
		f := th*(1+t2*(k1+t2*(k2+t2*(k3+t2*k4)))) - thd
		df := 1 + t2*(3*k1+t2*(5*k2+t2*(7*k3+9*t2*k4)))
		if df == 0 {
			break
		}
		step := f / df
		th -= step
		if math.Abs(step) < undistortTol {
			if th < 0 || th >= math.Pi/2 {
				break
			}
			s := math.Tan(th) / thd
			return xd * s, yd * s, nil
		}
	}
	return 0, 0, fmt.Errorf("inverse fisheye distortion did not converge to an angle below 90°")
}
