package console

import (
	"math"

	"stillwater/homography"
)

// Solved is a solved calibration as the preview needs it: pool metres on
// the water surface to recorded frame pixels (lens distortion included),
// and the scale at a pixel.
type Solved interface {
	// Pixel returns the recorded pixel that sees pool point s; false when
	// the point is behind the camera or off the lens model.
	Pixel(s homography.Point) (homography.Point, bool)
	// MetresPerPixel is the side, metres, of the water one recorded
	// pixel covers at px.
	MetresPerPixel(px homography.Point) float64
	// Size is the pool's length and width, metres.
	Size() (length, width float64)
	// Corners are the corners A, B, C, D as used, recorded pixels.
	Corners() []homography.Point
}

// gridStep is the spacing, metres, of the points along each grid line:
// fine enough that a line bent by lens distortion is drawn bent.
const gridStep = 0.25

// PreviewOf draws the 1 m grid and the axes of a solved calibration in
// frame pixels and names the corners nearest to and farthest from the
// camera by their metres per pixel. Rectified view and notes are the
// caller's.
func PreviewOf(s Solved, frame [2]int) Preview {
	L, W := s.Size()
	p := Preview{Frame: frame}
	for _, c := range s.Corners() {
		p.Corners = append(p.Corners, [2]float64{c.X, c.Y})
	}
	line := func(a, b homography.Point) [][2]float64 {
		d := math.Hypot(b.X-a.X, b.Y-a.Y)
		n := max(1, int(math.Ceil(d/gridStep)))
		var out [][2]float64
		for i := 0; i <= n; i++ {
			t := float64(i) / float64(n)
			q, ok := s.Pixel(homography.Point{X: a.X + t*(b.X-a.X), Y: a.Y + t*(b.Y-a.Y)})
			if ok && finite(q.X, q.Y) {
				out = append(out, [2]float64{round2(q.X), round2(q.Y)})
			}
		}
		return out
	}
	// Every whole metre, and the far sides when the size is not whole.
	for _, x := range marks(L) {
		if l := line(homography.Point{X: x}, homography.Point{X: x, Y: W}); len(l) > 1 {
			p.Grid = append(p.Grid, l)
		}
	}
	for _, y := range marks(W) {
		if l := line(homography.Point{Y: y}, homography.Point{X: L, Y: y}); len(l) > 1 {
			p.Grid = append(p.Grid, l)
		}
	}
	p.AxisX = line(homography.Point{}, homography.Point{X: 1})
	p.AxisY = line(homography.Point{}, homography.Point{Y: 1})
	p.NearMPP, p.FarMPP = math.Inf(1), 0
	for i, q := range []homography.Point{{}, {X: L}, {X: L, Y: W}, {Y: W}} {
		px, ok := s.Pixel(q)
		if !ok {
			continue
		}
		m := s.MetresPerPixel(px)
		if !finite(m) {
			continue
		}
		name := string(rune('A' + i))
		if m < p.NearMPP {
			p.NearMPP, p.NearCorner = m, name
		}
		if m > p.FarMPP {
			p.FarMPP, p.FarCorner = m, name
		}
	}
	if p.NearCorner == "" {
		p.NearMPP = 0
	}
	return p
}

// marks are 0, 1, 2 … up to n, and n itself when it is not whole.
func marks(n float64) []float64 {
	var out []float64
	for x := 0.0; x <= n+1e-9; x++ {
		out = append(out, x)
	}
	if math.Abs(out[len(out)-1]-n) > 1e-9 {
		out = append(out, n)
	}
	return out
}

func round2(v float64) float64 { return math.Round(v*100) / 100 }
