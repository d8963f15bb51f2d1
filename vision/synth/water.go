package synth

import (
	"fmt"
	"math"
)

// Project returns the camera pixel (origin top-left, y down) of the point
// (x, y, z) in pool metres, z up from the water surface, as the scene's
// camera sees it before any pan. ok is false behind the camera. No
// refraction is applied: for an underwater point use Apparent first.
func (s Scene) Project(x, y, z float64) (u, v float64, ok bool) {
	return newCamera(s.Camera, s.Width, s.Height).project(x, y, z)
}

// Apparent returns where on the water surface (pool metres) the scene's
// camera sees a point that really lies depth metres below the surface at
// (x, y): the point where the sight line enters the water, bent there by
// Snell's law with index WaterIndex.
func (s Scene) Apparent(x, y, depth float64) (sx, sy float64, err error) {
	return apparent([3]float64{s.Camera.X, s.Camera.Y, s.Camera.Height}, x, y, depth, WaterIndex)
}

// apparent finds the surface crossing of the light path from the
// underwater point (x, y, -depth) to the camera centre cam.
//
// It works in 3-D with the vector form of Snell's law (refracted
// direction t = η·d + (η·cos θi − cos θt)·n for unit incident d, upward
// normal n and η = 1/index), tracing a candidate sight line from the
// camera to a surface point and down to the floor, and bisects along the
// line from the camera foot to the target until the traced ray lands on
// the target. It shares no code with the homography package's refraction,
// so tests can hold one against the other.
func apparent(cam [3]float64, x, y, depth, index float64) (float64, float64, error) {
	if depth == 0 {
		return x, y, nil
	}
	if !(depth > 0) || !(cam[2] > 0) {
		return 0, 0, fmt.Errorf("apparent position: depth %g m and camera height %g m must be positive", depth, cam[2])
	}
	dx, dy := x-cam[0], y-cam[1]
	R := math.Hypot(dx, dy)
	if R < 1e-12 {
		return x, y, nil
	}
	ux, uy := dx/R, dy/R
	// land returns the horizontal distance from the camera foot at which
	// the sight line through the surface point at distance r reaches the
	// target's depth.
	land := func(r float64) float64 {
		d := [3]float64{ux * r, uy * r, -cam[2]} // camera → surface point
		n := math.Sqrt(d[0]*d[0] + d[1]*d[1] + d[2]*d[2])
		for i := range d {
			d[i] /= n
		}
		eta := 1 / index
		cosI := -d[2] // angle with the upward normal (0, 0, 1)
		cosT := math.Sqrt(1 - eta*eta*(1-cosI*cosI))
		t := [3]float64{eta * d[0], eta * d[1], eta*d[2] + (eta*cosI-cosT)*1}
		// From the surface, down depth metres along t.
		k := depth / -t[2]
		return r + k*math.Hypot(t[0], t[1])
	}
	// land is increasing in r, land(0) = 0 and land(R) > R.
	lo, hi := 0.0, R
	for i := 0; i < 200 && hi-lo > 1e-12; i++ {
		mid := (lo + hi) / 2
		if land(mid) < R {
			lo = mid
		} else {
			hi = mid
		}
	}
	r := (lo + hi) / 2
	return cam[0] + ux*r, cam[1] + uy*r, nil
}
