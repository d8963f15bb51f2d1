package homography

import (
	"fmt"
	"math"
)

// WaterIndex is the refractive index of pool water for visible light. The
// CRC Handbook of Chemistry and Physics gives 1.33299 for pure water at
// 20 °C; dissolved chlorine and salt move it by less than the third
// decimal, so 1.333 is used.
const WaterIndex = 1.333

// DefaultCopingHeight is the usual height, in metres, of the top of a
// pool's coping above the water line. It is common practice, not a
// standard: measure the real pool when corners are clicked on the coping.
const DefaultCopingHeight = 0.12

// Camera is the camera centre in the pool frame: X, Y in pool metres
// (origin corner A, x along the length, y along the width) and Height in
// metres above the water surface.
type Camera struct {
	X, Y, Height float64
}

func (c Camera) check() error {
	if math.IsNaN(c.X) || math.IsNaN(c.Y) || math.IsInf(c.X, 0) || math.IsInf(c.Y, 0) {
		return fmt.Errorf("camera position (%v, %v) m is not finite; estimate it with EstimatePose or measure it", c.X, c.Y)
	}
	if !(c.Height > 0) || math.IsInf(c.Height, 0) {
		return fmt.Errorf("camera height %v m is not a positive finite height above the water", c.Height)
	}
	return nil
}

// DepthProfile describes the pool floor's depth below the water surface,
// in metres. The floor either lies at one fixed depth, or slopes linearly
// along the pool's x axis from Shallow at x = ShallowX to Deep at
// x = DeepX (pool metres), holding those depths beyond either end.
type DepthProfile struct {
	Shallow, Deep   float64
	ShallowX, DeepX float64
}

// FixedDepth returns the profile of a flat floor d metres below the
// surface.
func FixedDepth(d float64) DepthProfile {
	return DepthProfile{Shallow: d, Deep: d}
}

// LinearFloor returns the profile of a floor sloping from shallow metres
// deep at x = shallowX to deep metres at x = deepX (pool metres).
func LinearFloor(shallow, deep, shallowX, deepX float64) DepthProfile {
	return DepthProfile{Shallow: shallow, Deep: deep, ShallowX: shallowX, DeepX: deepX}
}

// Validate reports whether the profile describes a real floor.
func (d DepthProfile) Validate() error {
	for _, v := range []float64{d.Shallow, d.Deep, d.ShallowX, d.DeepX} {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return fmt.Errorf("depth profile %+v has a non-finite value; give depths and positions in metres", d)
		}
	}
	if d.Shallow < 0 || d.Deep < 0 {
		return fmt.Errorf("depth profile: depths %v and %v m must not be negative (they are below the surface)", d.Shallow, d.Deep)
	}
	if d.Shallow != d.Deep && d.ShallowX == d.DeepX {
		return fmt.Errorf("depth profile: shallow and deep ends both at x = %v m; put them at different positions along the length", d.ShallowX)
	}
	return nil
}

// At returns the floor depth in metres at pool x (metres along the length).
func (d DepthProfile) At(x float64) float64 {
	if d.Shallow == d.Deep || d.ShallowX == d.DeepX {
		return d.Shallow
	}
	t := (x - d.ShallowX) / (d.DeepX - d.ShallowX)
	t = math.Max(0, math.Min(1, t))
	return d.Shallow + t*(d.Deep-d.Shallow)
}

// refractedDir returns the unit horizontal direction away from the camera
// foot and tan of the refracted angle from vertical for a sight line that
// meets the water at surface. Directly below the camera the ray is
// vertical and the direction is zero.
func refractedDir(cam Camera, surface Point, n float64) (Point, float64) {
	dx, dy := surface.X-cam.X, surface.Y-cam.Y
	r := math.Hypot(dx, dy)
	if r == 0 {
		return Point{}, 0
	}
	// tan θair = r/height; sin θw = sin θair / n (Snell's law).
	sinAir := r / math.Hypot(r, cam.Height)
	sinW := sinAir / n
	tanW := sinW / math.Sqrt(1-sinW*sinW)
	return Point{dx / r, dy / r}, tanW
}

func checkIndex(n float64) error {
	if !(n >= 1) || math.IsInf(n, 0) {
		return fmt.Errorf("refractive index %v is below 1 or not finite; use WaterIndex for water", n)
	}
	return nil
}

// Refract returns where the camera's sight line, after entering the water
// at surface (pool metres on the water surface), reaches depth metres
// below it, with water of refractive index n (WaterIndex for a pool). The
// result is in pool metres: the horizontal position of that underwater
// point. The refracted ray bends toward the vertical, so the point is
// nearer the surface point than the unbent sight line would be.
func Refract(cam Camera, surface Point, depth, n float64) (Point, error) {
	if err := cam.check(); err != nil {
		return Point{}, fmt.Errorf("refract: %w", err)
	}
	if err := checkIndex(n); err != nil {
		return Point{}, fmt.Errorf("refract: %w", err)
	}
	if !(depth >= 0) || math.IsInf(depth, 0) {
		return Point{}, fmt.Errorf("refract: depth %v m is not a non-negative finite depth below the surface", depth)
	}
	u, tanW := refractedDir(cam, surface, n)
	return Point{surface.X + depth*tanW*u.X, surface.Y + depth*tanW*u.Y}, nil
}

// RefractToFloor returns where the refracted sight line through surface
// (pool metres on the water surface) meets the floor described by prof,
// and the floor depth there in metres. On a sloping floor the depth
// depends on where the ray lands, which depends on the depth, so it
// iterates to a fixed point; that converges for any floor slope a pool
// can have (the slope times the refracted tangent, at most 1.14 in water,
// is well below 1).
func RefractToFloor(cam Camera, surface Point, prof DepthProfile, n float64) (Point, float64, error) {
	if err := cam.check(); err != nil {
		return Point{}, 0, fmt.Errorf("refract to floor: %w", err)
	}
	if err := checkIndex(n); err != nil {
		return Point{}, 0, fmt.Errorf("refract to floor: %w", err)
	}
	if err := prof.Validate(); err != nil {
		return Point{}, 0, fmt.Errorf("refract to floor: %w", err)
	}
	u, tanW := refractedDir(cam, surface, n)
	d := prof.At(surface.X)
	const tol = 1e-9 // metres: far below any measurement
	for i := 0; i < 50; i++ {
		x := surface.X + d*tanW*u.X
		next := prof.At(x)
		if math.Abs(next-d) < tol {
			d = next
			return Point{surface.X + d*tanW*u.X, surface.Y + d*tanW*u.Y}, d, nil
		}
		d = next
	}
	return Point{}, 0, fmt.Errorf("refract to floor: depth at the refracted point did not converge from surface point (%.3f, %.3f) m; the floor slope in the profile is too steep", surface.X, surface.Y)
}

// CopingToSurface moves a point from the coping plane to the water
// surface. When the corners were clicked on the coping, coping metres
// above the water, the homography maps pixels to that raised plane; the
// camera's sight line through point p (pool metres on the coping plane)
// meets the water farther from the camera foot, by the ratio
// height/(height - coping). cam.Height is above the water.
//
// It is a radial rescale about the camera foot and nothing more: lens
// distortion and the coping's overhang are ignored, since both are small
// beside click error.
func CopingToSurface(cam Camera, p Point, coping float64) (Point, error) {
	if err := cam.check(); err != nil {
		return Point{}, fmt.Errorf("coping to surface: %w", err)
	}
	if !(coping >= 0) || coping >= cam.Height {
		return Point{}, fmt.Errorf("coping to surface: coping height %v m must be at least 0 and below the camera height %v m", coping, cam.Height)
	}
	return scaleAbout(cam, p, cam.Height/(cam.Height-coping)), nil
}

// SurfaceToCoping is the inverse of CopingToSurface: it moves a point on
// the water surface (pool metres) to where the same sight line crosses the
// coping plane, coping metres higher.
func SurfaceToCoping(cam Camera, p Point, coping float64) (Point, error) {
	if err := cam.check(); err != nil {
		return Point{}, fmt.Errorf("surface to coping: %w", err)
	}
	if !(coping >= 0) || coping >= cam.Height {
		return Point{}, fmt.Errorf("surface to coping: coping height %v m must be at least 0 and below the camera height %v m", coping, cam.Height)
	}
	return scaleAbout(cam, p, (cam.Height-coping)/cam.Height), nil
}

func scaleAbout(cam Camera, p Point, k float64) Point {
	return Point{cam.X + k*(p.X-cam.X), cam.Y + k*(p.Y-cam.Y)}
}
