package homography

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// cornerNames labels the pool corners in the order the installer clicks
// them: A is the pool-frame origin, B lies along the length from A, C is
// diagonally opposite A and D lies along the width from A.
var cornerNames = [4]string{"A", "B", "C", "D"}

// Tolerances for corner validation, in pixels or as a fraction of the
// outline size. They are coarse on purpose: clicks are accurate to a few
// pixels, and anything tighter would reject real installs.
const (
	// minCornerSeparation is the distance in pixels below which two
	// corners count as the same click.
	minCornerSeparation = 2.0
	// collinearFraction is the distance of a corner from the line through
	// two others, as a fraction of that segment's length, below which the
	// three count as collinear.
	collinearFraction = 0.01
)

func cornerName(i int) string {
	if i >= 0 && i < len(cornerNames) {
		return cornerNames[i]
	}
	return fmt.Sprintf("#%d", i)
}

// ValidateCorners checks the four pool corners A, B, C, D clicked by the
// installer, in pixels (origin top-left of the full-resolution frame, x
// right, y down), against an image of imageW × imageH pixels.
//
// It returns the corners in the order to pair with the pool corners
// (0,0), (L,0), (L,W), (0,W), or an error that names the offending corner,
// says how to fix it, and wraps one of ErrCornerCount,
// ErrCornerOutsideImage, ErrDuplicateCorner, ErrCollinearCorners,
// ErrSelfIntersecting or ErrNotConvex.
//
// Reordering: when the given order makes a bow-tie but swapping C and D
// gives a convex outline, the swapped corners are returned with a nil
// error. That fix is unambiguous because A and B stay where the installer
// put them, so the length edge A→B keeps its meaning. When B is instead
// diagonally opposite A, either neighbour of A could be the length edge,
// so ValidateCorners returns ErrSelfIntersecting naming corner B. Either
// winding (clockwise or anticlockwise on screen) is accepted, because the
// pool frame may be mirrored relative to the image.
func ValidateCorners(px []Point, imageW, imageH int) ([]Point, error) {
	if imageW <= 0 || imageH <= 0 {
		return nil, fmt.Errorf("validate corners: image size %d×%d px is not positive; pass the camera's full-resolution frame size", imageW, imageH)
	}
	if len(px) != 4 {
		return nil, fmt.Errorf("validate corners: %w: have %d, need exactly 4 (A, B, C, D in order around the pool)", ErrCornerCount, len(px))
	}
	for i, p := range px {
		if math.IsNaN(p.X) || math.IsNaN(p.Y) || math.IsInf(p.X, 0) || math.IsInf(p.Y, 0) {
			return nil, fmt.Errorf("validate corners: %w: corner %s is not a finite position (%v, %v); click corner %s again", ErrCornerOutsideImage, cornerName(i), p.X, p.Y, cornerName(i))
		}
		if p.X < 0 || p.Y < 0 || p.X > float64(imageW) || p.Y > float64(imageH) {
			return nil, fmt.Errorf("validate corners: %w: corner %s at (%.1f, %.1f) px is outside the %d×%d px image; click it inside the frame, or move the camera so the whole pool is in view", ErrCornerOutsideImage, cornerName(i), p.X, p.Y, imageW, imageH)
		}
	}
	for j := 1; j < 4; j++ {
		for i := 0; i < j; i++ {
			if px[i].Dist(px[j]) < minCornerSeparation {
				return nil, fmt.Errorf("validate corners: %w: corner %s duplicates corner %s at (%.1f, %.1f) px; click corner %s on its own corner of the pool", ErrDuplicateCorner, cornerName(j), cornerName(i), px[i].X, px[i].Y, cornerName(j))
			}
		}
	}
	// Every triple: report the middle corner, the one lying between the
	// other two, because it is the likeliest mis-click.
	triples := [4][3]int{{0, 1, 2}, {0, 1, 3}, {0, 2, 3}, {1, 2, 3}}
	for _, tr := range triples {
		if mid, ok := collinear(px, tr); ok {
			others := [2]string{}
			k := 0
			for _, i := range tr {
				if i != mid {
					others[k] = cornerName(i)
					k++
				}
			}
			return nil, fmt.Errorf("validate corners: %w: corner %s lies on the line through corners %s and %s; click corner %s on the pool's corner, not along an edge", ErrCollinearCorners, cornerName(mid), others[0], others[1], cornerName(mid))
		}
	}
	if convex(px) {
		return append([]Point(nil), px...), nil
	}
	// One corner inside the triangle of the others: no ordering is convex.
	for i := 0; i < 4; i++ {
		var tri [3]Point
		k := 0
		for j := 0; j < 4; j++ {
			if j != i {
				tri[k] = px[j]
				k++
			}
		}
		if insideTriangle(px[i], tri) {
			return nil, fmt.Errorf("validate corners: %w: corner %s lies inside the triangle of the other three; click corner %s on the pool's corner", ErrNotConvex, cornerName(i), cornerName(i))
		}
	}
	swapped := []Point{px[0], px[1], px[3], px[2]}
	if convex(swapped) {
		return swapped, nil
	}
	return nil, fmt.Errorf("validate corners: %w: corner B is diagonally opposite corner A; click B next to A along the pool's length, then C and D on around the pool", ErrSelfIntersecting)
}

// cross returns the z component of (b-a)×(c-a).
func cross(a, b, c Point) float64 {
	return (b.X-a.X)*(c.Y-a.Y) - (b.Y-a.Y)*(c.X-a.X)
}

// collinear reports whether the three corners px[tr[...]] lie nearly on a
// line, and if so which of them lies between the other two.
func collinear(px []Point, tr [3]int) (int, bool) {
	// The longest side's endpoints are the outer two; the third is the middle.
	best, mid := -1.0, -1
	for k := 0; k < 3; k++ {
		a, b, c := tr[k], tr[(k+1)%3], tr[(k+2)%3]
		if d := px[a].Dist(px[b]); d > best {
			best, mid = d, c
		}
	}
	ends := make([]int, 0, 2)
	for _, i := range tr {
		if i != mid {
			ends = append(ends, i)
		}
	}
	a, b := ends[0], ends[1]
	h := math.Abs(cross(px[a], px[b], px[mid])) / best
	return mid, h < collinearFraction*best
}

// convex reports whether the closed polygon q turns the same way at every
// vertex, which for four points with no three collinear means a convex,
// simple quadrilateral.
func convex(q []Point) bool {
	var pos, neg int
	for i := range q {
		c := cross(q[i], q[(i+1)%len(q)], q[(i+2)%len(q)])
		if c > 0 {
			pos++
		} else if c < 0 {
			neg++
		}
	}
	return pos == len(q) || neg == len(q)
}

func insideTriangle(p Point, t [3]Point) bool {
	d1 := cross(t[0], t[1], p)
	d2 := cross(t[1], t[2], p)
	d3 := cross(t[2], t[0], p)
	hasNeg := d1 < 0 || d2 < 0 || d3 < 0
	hasPos := d1 > 0 || d2 > 0 || d3 > 0
	return !(hasNeg && hasPos)
}

// maxCondition is the largest condition number accepted for a homography
// after Hartley normalisation of both point sets; a well-posed pool
// calibration is of order 1–100, so 1e6 is far outside normal.
const maxCondition = 1e6

// CheckSolution checks a solved homography h that maps src to dst (for
// the installer's calibration: src in pixels, origin top-left, y down;
// dst in pool metres, origin corner A, x along the length). It returns an
// error wrapping ErrNearSingular when h is nearly degenerate or sends a
// point to infinity or across the horizon line, and ErrReprojection when
// the root-mean-square distance between h(src[i]) and dst[i], in dst
// units, exceeds maxRMS. The error names the worst point (as corner A–D
// when there are four) and suggests a fix.
func CheckSolution(h H, src, dst []Point, maxRMS float64) error {
	if len(src) != len(dst) {
		return fmt.Errorf("check homography: %d source points but %d destination points; pass one destination per source point", len(src), len(dst))
	}
	if len(src) < 4 {
		return fmt.Errorf("check homography: need at least 4 point pairs, have %d", len(src))
	}
	if !(maxRMS > 0) {
		return fmt.Errorf("check homography: maximum RMS error %v is not positive; pass the allowed error in destination units", maxRMS)
	}
	name := func(i int) string {
		if len(src) == 4 {
			return "corner " + cornerName(i)
		}
		return fmt.Sprintf("point %d", i)
	}
	ns, err := normalizer(src)
	if err != nil {
		return fmt.Errorf("check homography: source points: %w", err)
	}
	nd, err := normalizer(dst)
	if err != nil {
		return fmt.Errorf("check homography: destination points: %w", err)
	}
	nsInv, err := ns.Inverse()
	if err != nil {
		return fmt.Errorf("check homography: %w", err)
	}
	// Normalising removes the pixel-versus-metre scale difference, so the
	// condition number reflects geometry, not units.
	hn := nd.Mul(h).Mul(nsInv)
	var sv mat.SVD
	if !sv.Factorize(mat.NewDense(3, 3, hn[:]), mat.SVDNone) {
		return fmt.Errorf("check homography: %w: SVD did not converge; re-solve from the corners", ErrNearSingular)
	}
	s := sv.Values(nil)
	if s[0] == 0 || s[2]/s[0] < 1/maxCondition || math.IsNaN(s[2]) {
		return fmt.Errorf("check homography: %w: condition number above %.0g; check that no three points are collinear and re-click them", ErrNearSingular, maxCondition)
	}
	sign := 0.0
	for i, p := range src {
		w := h.W(p)
		if math.Abs(w) < 1e-12 {
			return fmt.Errorf("check homography: %w: %s maps to infinity; re-click it", ErrNearSingular, name(i))
		}
		// All calibration points must be on one side of the horizon line,
		// or the mapping folds the pool through infinity.
		if sign == 0 {
			sign = math.Copysign(1, w)
		} else if math.Copysign(1, w) != sign {
			return fmt.Errorf("check homography: %w: %s lies beyond the horizon line of the others; re-click it or check the corner order", ErrNearSingular, name(i))
		}
	}
	rms, _ := Reprojection(h, src, dst)
	if rms > maxRMS {
		worst, wi := -1.0, 0
		for i := range src {
			q, _ := h.Map(src[i])
			if d := q.Dist(dst[i]); d > worst {
				worst, wi = d, i
			}
		}
		return fmt.Errorf("check homography: %w: RMS %.3g exceeds %.3g; %s is worst, %.3g from its target; re-click it or correct its pool coordinates", ErrReprojection, rms, maxRMS, name(wi), worst)
	}
	return nil
}
