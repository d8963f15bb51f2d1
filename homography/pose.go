package homography

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// Intrinsics is a pinhole camera's calibration in pixels (origin top-left
// of the full-resolution frame, x right, y down): focal lengths Fx, Fy and
// principal point (Cx, Cy). Lens distortion is assumed already removed.
type Intrinsics struct {
	Fx, Fy, Cx, Cy float64
}

// IntrinsicsFromFOV returns the intrinsics of an undistorted camera with
// horizontal field of view hfovDeg degrees and an imageW × imageH pixel
// frame, with square pixels and the principal point at the frame centre
// (imageW/2, imageH/2), which is what a camera without a calibration
// report is best assumed to have.
func IntrinsicsFromFOV(hfovDeg float64, imageW, imageH int) (Intrinsics, error) {
	if !(hfovDeg > 0 && hfovDeg < 180) {
		return Intrinsics{}, fmt.Errorf("intrinsics from field of view: horizontal field of view %v° must be between 0 and 180; take it from the camera's data sheet", hfovDeg)
	}
	if imageW <= 0 || imageH <= 0 {
		return Intrinsics{}, fmt.Errorf("intrinsics from field of view: image size %d×%d px is not positive", imageW, imageH)
	}
	f := float64(imageW) / 2 / math.Tan(hfovDeg*math.Pi/360)
	return Intrinsics{Fx: f, Fy: f, Cx: float64(imageW) / 2, Cy: float64(imageH) / 2}, nil
}

// Pose is a camera's position and orientation in the pool frame.
type Pose struct {
	// Camera is the camera centre: X, Y in pool metres (origin corner A,
	// x along the length, y along the width) and Height in metres above
	// the plane the homography was fitted to (the water surface, or the
	// coping if the corners were clicked there).
	Camera
	// Mirrored is true when the pool frame, with z = x × y, has z pointing
	// down into the water rather than up; the camera then comes out at
	// negative z, and Height is reported as its magnitude.
	Mirrored bool
	// R is the rotation from the pool frame (x, y, z = x × y) to the
	// camera frame (x right, y down, z forward), row-major.
	R [9]float64
}

// EstimatePose recovers the camera pose from pixToPool, the homography
// from pixels (origin top-left, y down) to pool metres on the water
// surface, and the camera intrinsics k.
//
// It inverts pixToPool to get the pool→image homography G = K[r1 r2 t],
// scales K⁻¹G so that r1 has unit length, picks the sign that puts the
// pool in front of the camera, completes r3 = r1 × r2, snaps R to the
// nearest rotation (noise leaves r1, r2 slightly non-orthogonal), and
// returns the camera centre C = -Rᵀt. The pool frame may be mirrored
// relative to z-up (pixels have y down, so a frame that looks right-handed
// on screen can have x × y pointing into the water); then C has negative
// z, Height is -C.z, and Mirrored is set.
func EstimatePose(pixToPool H, k Intrinsics) (Pose, error) {
	if !(k.Fx > 0) || !(k.Fy > 0) || math.IsInf(k.Fx, 0) || math.IsInf(k.Fy, 0) || math.IsNaN(k.Cx) || math.IsNaN(k.Cy) {
		return Pose{}, fmt.Errorf("estimate camera pose: intrinsics %+v need positive focal lengths and a finite principal point", k)
	}
	g, err := pixToPool.Inverse()
	if err != nil {
		return Pose{}, fmt.Errorf("estimate camera pose: invert pixel→pool homography: %w", err)
	}
	// K⁻¹ for K = [fx 0 cx; 0 fy cy; 0 0 1].
	kinv := H{1 / k.Fx, 0, -k.Cx / k.Fx, 0, 1 / k.Fy, -k.Cy / k.Fy, 0, 0, 1}
	m := kinv.Mul(g)
	col := func(j int) [3]float64 { return [3]float64{m[j], m[3+j], m[6+j]} }
	h1, h2, h3 := col(0), col(1), col(2)
	n1 := norm3(h1)
	if n1 == 0 || norm3(h2) == 0 {
		return Pose{}, fmt.Errorf("estimate camera pose: homography has a zero column; re-solve it from the pool corners")
	}
	lambda := 1 / n1
	// Pool corner A (the origin) is in front of the camera: t.z > 0.
	if h3[2] < 0 {
		lambda = -lambda
	}
	r1, r2, t := scale3(h1, lambda), scale3(h2, lambda), scale3(h3, lambda)
	r3 := cross3(r1, r2)
	r := mat.NewDense(3, 3, []float64{
		r1[0], r2[0], r3[0],
		r1[1], r2[1], r3[1],
		r1[2], r2[2], r3[2],
	})
	var svd mat.SVD
	if !svd.Factorize(r, mat.SVDFull) {
		return Pose{}, fmt.Errorf("estimate camera pose: SVD of the rotation did not converge")
	}
	var u, v, rot mat.Dense
	svd.UTo(&u)
	svd.VTo(&v)
	rot.Mul(&u, v.T())
	var p Pose
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			p.R[3*i+j] = rot.At(i, j)
		}
	}
	// C = -Rᵀ t.
	var c [3]float64
	for j := 0; j < 3; j++ {
		for i := 0; i < 3; i++ {
			c[j] -= p.R[3*i+j] * t[i]
		}
	}
	p.X, p.Y = c[0], c[1]
	p.Height = c[2]
	if c[2] < 0 {
		p.Height, p.Mirrored = -c[2], true
	}
	if !(p.Height > 0) {
		return Pose{}, fmt.Errorf("estimate camera pose: camera lies in the pool plane; check the corners and the intrinsics")
	}
	return p, nil
}

// EstimatePoseFOV is EstimatePose with intrinsics from a horizontal field
// of view in degrees and the image size in pixels (see IntrinsicsFromFOV).
func EstimatePoseFOV(pixToPool H, hfovDeg float64, imageW, imageH int) (Pose, error) {
	k, err := IntrinsicsFromFOV(hfovDeg, imageW, imageH)
	if err != nil {
		return Pose{}, fmt.Errorf("estimate camera pose: %w", err)
	}
	return EstimatePose(pixToPool, k)
}

func norm3(a [3]float64) float64 { return math.Sqrt(a[0]*a[0] + a[1]*a[1] + a[2]*a[2]) }

func scale3(a [3]float64, s float64) [3]float64 { return [3]float64{a[0] * s, a[1] * s, a[2] * s} }

func cross3(a, b [3]float64) [3]float64 {
	return [3]float64{a[1]*b[2] - a[2]*b[1], a[2]*b[0] - a[0]*b[2], a[0]*b[1] - a[1]*b[0]}
}
