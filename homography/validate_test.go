package homography

import (
	"fmt"
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// A convex pool outline as an overhead camera sees it in a 640×480 frame.
var (
	cA = Point{100, 400}
	cB = Point{540, 400}
	cC = Point{480, 100}
	cD = Point{160, 100}
)

func TestValidateCorners(t *testing.T) {
	tests := []struct {
		name       string
		px         []Point
		w, h       int
		want       []Point // nil when an error is expected
		wantErr    error
		wantSubstr []string
	}{
		{name: "convex, anticlockwise on screen", px: []Point{cA, cB, cC, cD}, want: []Point{cA, cB, cC, cD}},
		{name: "convex, clockwise on screen (mirrored frame)", px: []Point{cA, cD, cC, cB}, want: []Point{cA, cD, cC, cB}},
		{name: "C and D swapped is reordered", px: []Point{cA, cB, cD, cC}, want: []Point{cA, cB, cC, cD}},
		{
			name: "B diagonal from A is ambiguous", px: []Point{cA, cC, cB, cD},
			wantErr: ErrSelfIntersecting, wantSubstr: []string{"corner B is diagonally opposite corner A", "click B next to A"},
		},
		{
			name: "three corners", px: []Point{cA, cB, cC},
			wantErr: ErrCornerCount, wantSubstr: []string{"have 3, need exactly 4"},
		},
		{
			name: "five corners", px: []Point{cA, cB, cC, cD, {300, 300}},
			wantErr: ErrCornerCount, wantSubstr: []string{"have 5"},
		},
		{
			name: "duplicate", px: []Point{cA, cB, {cB.X + 0.5, cB.Y - 0.5}, cD},
			wantErr: ErrDuplicateCorner, wantSubstr: []string{"corner C duplicates corner B", "click corner C on its own corner"},
		},
		{
			name: "collinear, B midway between A and C", px: []Point{cA, {290, 250}, cC, cD},
			wantErr: ErrCollinearCorners, wantSubstr: []string{"corner B lies on the line through corners A and C", "click corner B on the pool's corner"},
		},
		{
			name: "collinear within tolerance", px: []Point{cA, cB, {320, 401}, cD},
			wantErr: ErrCollinearCorners, wantSubstr: []string{"corner C lies on the line through corners A and B"},
		},
		{
			name: "outside the image", px: []Point{cA, cB, cC, {-5, 100}},
			wantErr: ErrCornerOutsideImage, wantSubstr: []string{"corner D at (-5.0, 100.0) px is outside the 640×480 px image", "move the camera"},
		},
		{
			name: "below the frame", px: []Point{cA, {540, 481}, cC, cD},
			wantErr: ErrCornerOutsideImage, wantSubstr: []string{"corner B at (540.0, 481.0)"},
		},
		{
			name: "not a number", px: []Point{cA, cB, {math.NaN(), 3}, cD},
			wantErr: ErrCornerOutsideImage, wantSubstr: []string{"corner C is not a finite position"},
		},
		{
			name: "D inside the triangle ABC", px: []Point{cA, cB, cC, {400, 330}},
			wantErr: ErrNotConvex, wantSubstr: []string{"corner D lies inside the triangle of the other three"},
		},
		{
			name: "A inside the triangle BCD", px: []Point{{320, 200}, cB, cC, cD},
			wantErr: ErrNotConvex, wantSubstr: []string{"corner A lies inside the triangle"},
		},
		{
			name: "bad image size", px: []Point{cA, cB, cC, cD}, w: -1, h: 480,
			wantSubstr: []string{"image size -1×480 px is not positive"},
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			w, h := tt.w, tt.h
			if w == 0 && h == 0 {
				w, h = 640, 480
			}
			in := append([]Point(nil), tt.px...)
			got, err := ValidateCorners(tt.px, w, h)
			// Compare as text: NaN never equals itself.
			assert.Equal(t, fmt.Sprint(in), fmt.Sprint(tt.px), "input must not be modified")
			if tt.want != nil {
				require.NoError(t, err)
				assert.Equal(t, tt.want, got)
				return
			}
			require.Error(t, err)
			assert.Nil(t, got)
			if tt.wantErr != nil {
				assert.ErrorIs(t, err, tt.wantErr)
			}
			for _, s := range tt.wantSubstr {
				assert.Contains(t, err.Error(), s)
			}
		})
	}
}

func TestCheckSolution(t *testing.T) {
	px := []Point{cA, cB, cC, cD}
	pool := []Point{{0, 0}, {10, 0}, {10, 5}, {0, 5}}
	h, err := Solve(px, pool)
	require.NoError(t, err)

	movedC := []Point{{0, 0}, {10, 0}, {10.6, 5.2}, {0, 5}}
	fivePx := []Point{cA, cB, cC, cD, {320, 250}}
	q, _ := h.Map(Point{320, 250})
	fiveBad := []Point{{0, 0}, {10, 0}, {10, 5}, {0, 5}, {q.X + 1, q.Y}}

	tests := []struct {
		name       string
		h          H
		src, dst   []Point
		maxRMS     float64
		wantErr    error
		wantSubstr []string
	}{
		{name: "good fit", h: h, src: px, dst: pool, maxRMS: 0.05},
		{
			name: "one corner's target wrong", h: h, src: px, dst: movedC, maxRMS: 0.05,
			wantErr: ErrReprojection, wantSubstr: []string{"corner C is worst", "re-click it or correct its pool coordinates"},
		},
		{
			name: "fifth point wrong", h: h, src: fivePx, dst: fiveBad, maxRMS: 0.05,
			wantErr: ErrReprojection, wantSubstr: []string{"point 4 is worst"},
		},
		{
			name: "rank-deficient", h: H{0.02, 0, 0, 0.02, 0, 0, 0, 0, 1}, src: px, dst: pool, maxRMS: 100,
			wantErr: ErrNearSingular, wantSubstr: []string{"condition number", "no three points are collinear"},
		},
		{
			// w = y/100 - 2 changes sign at y = 200 px: A and B lie below
			// the horizon line, C and D above it.
			name: "corners straddle the horizon", h: H{1, 0, 0, 0, 1, 0, 0, 0.01, -2}, src: px, dst: pool, maxRMS: 1e9,
			wantErr: ErrNearSingular, wantSubstr: []string{"corner C lies beyond the horizon line"},
		},
		{name: "zero threshold", h: h, src: px, dst: pool, maxRMS: 0, wantSubstr: []string{"maximum RMS error 0 is not positive"}},
		{name: "mismatch", h: h, src: px, dst: pool[:3], maxRMS: 1, wantSubstr: []string{"4 source points but 3 destination"}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			err := CheckSolution(tt.h, tt.src, tt.dst, tt.maxRMS)
			if tt.wantSubstr == nil {
				assert.NoError(t, err)
				return
			}
			require.Error(t, err)
			if tt.wantErr != nil {
				assert.ErrorIs(t, err, tt.wantErr)
			}
			for _, s := range tt.wantSubstr {
				assert.Contains(t, err.Error(), s)
			}
		})
	}
}

func FuzzValidateCorners(f *testing.F) {
	f.Add(100.0, 400.0, 540.0, 400.0, 480.0, 100.0, 160.0, 100.0, 640, 480)
	f.Add(100.0, 400.0, 480.0, 100.0, 540.0, 400.0, 160.0, 100.0, 640, 480)
	f.Add(0.0, 0.0, 0.0, 0.0, 1.0, 1.0, 2.0, 2.0, 4, 4)
	f.Add(math.NaN(), 1.0, math.Inf(1), 2.0, -1.0, 3.0, 1e308, 1e308, 1<<30, 1)
	f.Fuzz(func(t *testing.T, ax, ay, bx, by, cx, cy, dx, dy float64, w, h int) {
		in := []Point{{ax, ay}, {bx, by}, {cx, cy}, {dx, dy}}
		got, err := ValidateCorners(in, w, h)
		if err != nil {
			if got != nil {
				t.Fatalf("error %v with corners %v", err, got)
			}
			return
		}
		// Accepted corners are the input corners, in a convex order, with A
		// still first, inside the image.
		if len(got) != 4 || got[0] != in[0] {
			t.Fatalf("accepted %v from %v", got, in)
		}
		for _, p := range got {
			found := false
			for _, q := range in {
				found = found || p == q
			}
			if !found || p.X < 0 || p.Y < 0 || p.X > float64(w) || p.Y > float64(h) {
				t.Fatalf("accepted corner %v not among %v or outside %d×%d", p, in, w, h)
			}
		}
		if !convex(got) {
			t.Fatalf("accepted non-convex corners %v", got)
		}
	})
}
