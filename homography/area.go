package homography

import "math"

// PolygonArea returns the area enclosed by a simple polygon by the shoelace
// formula, in the square of the polygon's units. The sign is dropped.
func PolygonArea(poly []Point) float64 {
	if len(poly) < 3 {
		return 0
	}
	var s float64
	for i := range poly {
		j := (i + 1) % len(poly)
		s += poly[i].X*poly[j].Y - poly[j].X*poly[i].Y
	}
	return math.Abs(s) / 2
}

// MappedArea returns the area of the pixel polygon poly after mapping it
// through h, in the square of h's destination units (m² for a pixel→pool
// transform). A homography maps straight edges to straight edges, so the
// mapped polygon's area is exact for a polygonal outline. It returns 0 when
// a vertex maps to infinity.
func MappedArea(h H, poly []Point) float64 {
	out := make([]Point, len(poly))
	for i, p := range poly {
		q, ok := h.Map(p)
		if !ok {
			return 0
		}
		out[i] = q
	}
	return PolygonArea(out)
}

// MetresPerPixel returns the linear scale of h at pixel p: the square root
// of the Jacobian determinant, i.e. the side in metres of the ground patch
// one pixel covers there.
func MetresPerPixel(h H, p Point) float64 {
	w := h.W(p)
	if math.Abs(w) < 1e-12 {
		return math.Inf(1)
	}
	// For x' = (h0 x + h1 y + h2)/w, the Jacobian determinant is det(H)/w³.
	j := h.Det() / (w * w * w)
	return math.Sqrt(math.Abs(j))
}
