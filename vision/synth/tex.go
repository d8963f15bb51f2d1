package synth

import "math"

// hash2 returns a deterministic value in [0, 1) for an integer lattice
// point and a seed.
func hash2(x, y int64, seed uint64) float64 {
	h := uint64(x)*0x9E3779B97F4A7C15 ^ uint64(y)*0xC2B2AE3D27D4EB4F ^ seed*0x165667B19E3779F9
	h ^= h >> 31
	h *= 0xBF58476D1CE4E5B9
	h ^= h >> 29
	h *= 0x94D049BB133111EB
	h ^= h >> 32
	return float64(h>>11) / (1 << 53)
}

// vnoise is smooth value noise on a unit lattice, in [0, 1).
func vnoise(x, y float64, seed uint64) float64 {
	fx, fy := math.Floor(x), math.Floor(y)
	ix, iy := int64(fx), int64(fy)
	tx, ty := x-fx, y-fy
	tx = tx * tx * (3 - 2*tx)
	ty = ty * ty * (3 - 2*ty)
	a := hash2(ix, iy, seed)
	b := hash2(ix+1, iy, seed)
	c := hash2(ix, iy+1, seed)
	d := hash2(ix+1, iy+1, seed)
	return a + (b-a)*tx + (c-a)*ty + (a-b-c+d)*tx*ty
}

// vnoiseP is value noise whose lattice repeats every period cells.
func vnoiseP(x, y float64, period int64, seed uint64) float64 {
	fx, fy := math.Floor(x), math.Floor(y)
	ix, iy := int64(fx), int64(fy)
	tx, ty := x-fx, y-fy
	tx = tx * tx * (3 - 2*tx)
	ty = ty * ty * (3 - 2*ty)
	w := func(i int64) int64 { return ((i % period) + period) % period }
	a := hash2(w(ix), w(iy), seed)
	b := hash2(w(ix+1), w(iy), seed)
	c := hash2(w(ix), w(iy+1), seed)
	d := hash2(w(ix+1), w(iy+1), seed)
	return a + (b-a)*tx + (c-a)*ty + (a-b-c+d)*tx*ty
}

// fbm sums octaves of value noise at scale (lattice cells per metre);
// the result is about 0–1 with mean 0.5.
func fbm(x, y, scale float64, octaves int, seed uint64) float64 {
	var sum, amp, norm float64 = 0, 1, 0
	for o := 0; o < octaves; o++ {
		sum += amp * vnoise(x*scale, y*scale, seed+uint64(o)*7919)
		norm += amp
		amp *= 0.5
		scale *= 2.03
	}
	return sum / norm
}

func mix(a, b RGB, t float64) RGB {
	return RGB{a[0] + t*(b[0]-a[0]), a[1] + t*(b[1]-a[1]), a[2] + t*(b[2]-a[2])}
}

func scale(a RGB, k float64) RGB { return RGB{a[0] * k, a[1] * k, a[2] * k} }

func lum(c RGB) float64 { return 0.114*c[0] + 0.587*c[1] + 0.299*c[2] }

func smoothstep(a, b, x float64) float64 {
	if x <= a {
		return 0
	}
	if x >= b {
		return 1
	}
	t := (x - a) / (b - a)
	return t * t * (3 - 2*t)
}

func clamp01(x float64) float64 { return math.Max(0, math.Min(1, x)) }
