package homography

import (
	"fmt"
	"math"
	"math/rand"
)

// RANSAC settings. The seed is fixed so that a calibration gives the same
// answer on every run; the confidence and iteration cap follow the values
// OpenCV's findHomography uses by default.
const (
	ransacSeed       = 1
	ransacConfidence = 0.995
	ransacMaxIters   = 2000
)

// SolveRobust fits the homography mapping src[i] to dst[i] while rejecting
// outlier pairs. thresh is the largest distance, in dst units (metres for
// a pixel→pool fit), between h(src[i]) and dst[i] for the pair to count as
// an inlier.
//
// With exactly four pairs it is Solve, with every pair an inlier. With
// more it runs RANSAC over four-pair minimal sets drawn by a seeded
// math/rand (deterministic), keeps the model with the most inliers (ties
// broken by the smaller summed error), and refits on the inliers with
// Solve, repeating until the inlier set stops changing. It returns the
// refit transform and the inlier mask, one entry per pair.
func SolveRobust(src, dst []Point, thresh float64) (H, []bool, error) {
	if len(src) != len(dst) {
		return H{}, nil, fmt.Errorf("solve robust homography: %d source points but %d destination points", len(src), len(dst))
	}
	n := len(src)
	if n < 4 {
		return H{}, nil, fmt.Errorf("solve robust homography: need at least 4 point pairs, have %d", n)
	}
	if !(thresh > 0) || math.IsInf(thresh, 0) {
		return H{}, nil, fmt.Errorf("solve robust homography: inlier threshold %v is not a positive finite distance", thresh)
	}
	if n == 4 {
		h, err := Solve(src, dst)
		if err != nil {
			return H{}, nil, fmt.Errorf("solve robust homography: %w", err)
		}
		return h, []bool{true, true, true, true}, nil
	}
	rng := rand.New(rand.NewSource(ransacSeed))
	var (
		bestH     H
		bestCount = -1
		bestErr   = math.Inf(1)
		found     bool
		sample    [4]int
		s4, d4    = make([]Point, 4), make([]Point, 4)
		iters     = ransacMaxIters
	)
	for it := 0; it < iters; it++ {
		drawSample(rng, n, &sample)
		for k, i := range sample {
			s4[k], d4[k] = src[i], dst[i]
		}
		if degenerateSample(s4) || degenerateSample(d4) {
			continue
		}
		h, err := Solve(s4, d4)
		if err != nil {
			continue
		}
		count, sum := scoreInliers(h, src, dst, thresh, nil)
		if count > bestCount || (count == bestCount && sum < bestErr) {
			bestH, bestCount, bestErr, found = h, count, sum, true
			iters = min(iters, adaptiveIters(float64(count)/float64(n)))
		}
	}
	if !found || bestCount < 4 {
		return H{}, nil, fmt.Errorf("solve robust homography: %w: best model fits %d of %d pairs within %v", ErrTooFewInliers, max(bestCount, 0), n, thresh)
	}
	mask := make([]bool, n)
	scoreInliers(bestH, src, dst, thresh, mask)
	h := bestH
	// Refit on the inliers; a least-squares fit can admit or drop pairs
	// near the threshold, so iterate a few times until the set settles.
	for round := 0; round < 5; round++ {
		var is, id []Point
		for i, in := range mask {
			if in {
				is, id = append(is, src[i]), append(id, dst[i])
			}
		}
		if len(is) < 4 {
			break
		}
		refit, err := Solve(is, id)
		if err != nil {
			return H{}, nil, fmt.Errorf("solve robust homography: refit on %d inliers: %w", len(is), err)
		}
		next := make([]bool, n)
		count, _ := scoreInliers(refit, src, dst, thresh, next)
		if count < 4 {
			break
		}
		h = refit
		same := true
		for i := range next {
			same = same && next[i] == mask[i]
		}
		mask = next
		if same {
			break
		}
	}
	return h, mask, nil
}

// drawSample fills s with four distinct indices in [0, n).
func drawSample(rng *rand.Rand, n int, s *[4]int) {
	for k := 0; k < 4; {
		v := rng.Intn(n)
		fresh := true
		for j := 0; j < k; j++ {
			fresh = fresh && s[j] != v
		}
		if fresh {
			s[k] = v
			k++
		}
	}
}

// degenerateSample reports whether any three of the four points are nearly
// collinear, which leaves the minimal-set homography undetermined.
func degenerateSample(p []Point) bool {
	scale := 0.0
	for i := range p {
		for j := i + 1; j < len(p); j++ {
			scale = math.Max(scale, p[i].Dist(p[j]))
		}
	}
	if scale == 0 {
		return true
	}
	tri := [4][3]int{{0, 1, 2}, {0, 1, 3}, {0, 2, 3}, {1, 2, 3}}
	for _, t := range tri {
		// Twice the triangle's area against the square of the spread.
		if math.Abs(cross(p[t[0]], p[t[1]], p[t[2]])) < 1e-6*scale*scale {
			return true
		}
	}
	return false
}

// scoreInliers counts the pairs that h maps within thresh of their target
// and sums their errors; when mask is non-nil it records which they are.
func scoreInliers(h H, src, dst []Point, thresh float64, mask []bool) (int, float64) {
	count, sum := 0, 0.0
	for i := range src {
		q, ok := h.Map(src[i])
		in := false
		if ok {
			if d := q.Dist(dst[i]); d <= thresh {
				in = true
				count++
				sum += d
			}
		}
		if mask != nil {
			mask[i] = in
		}
	}
	return count, sum
}

// adaptiveIters returns how many draws make it ransacConfidence likely
// that at least one all-inlier sample was drawn, given inlier ratio w.
func adaptiveIters(w float64) int {
	p := math.Pow(w, 4)
	if p >= 1 {
		return 1
	}
	if p <= 0 {
		return ransacMaxIters
	}
	k := math.Log(1-ransacConfidence) / math.Log(1-p)
	if math.IsNaN(k) || k > ransacMaxIters {
		return ransacMaxIters
	}
	return int(math.Ceil(k))
}
