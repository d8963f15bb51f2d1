package vision

import (
	"math"
	"math/rand"
	"testing"

	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"
)

// The pool model's loops (poolmodel.cpp) run along each row's channels
// with SIMD where OpenCV's universal intrinsics have it. These tests hold
// them (update, gain, short mean, glints) to the formulas of shim.h
// computed one pixel at a time in Go's float32 (each operation rounded:
// the conversions keep the compiler from fusing any), bit for bit, and
// the short mean to OpenCV's accumulateWeighted. Widths that are not a
// multiple of the vector length exercise the scalar tails.

// poolSizes are grid sizes: one narrower than a vector, odd widths, and
// one the size of a small pool's grid.
var poolSizes = [][2]int{{1, 3}, {7, 5}, {37, 23}, {101, 40}, {440, 200}}

// randMat32 is a CV_32FC(cn) Mat of values in [lo, hi) from rng.
func randMat32(t *testing.T, rng *rand.Rand, rows, cols, cn int, lo, hi float32) gocv.Mat {
	t.Helper()
	m := gocv.NewMatWithSize(rows, cols, gocv.MatTypeCV32FC1+gocv.MatType((cn-1)<<3))
	v, err := m.DataPtrFloat32()
	require.NoError(t, err)
	for i := range v {
		v[i] = lo + (hi-lo)*rng.Float32()
	}
	return m
}

// randMask is a CV_8UC1 Mat of 0 and 255, set with probability p.
func randMask(t *testing.T, rng *rand.Rand, rows, cols int, p float64) gocv.Mat {
	t.Helper()
	b := make([]byte, rows*cols)
	for i := range b {
		if rng.Float64() < p {
			b[i] = 255
		}
	}
	m, err := gocv.NewMatFromBytes(rows, cols, gocv.MatTypeCV8UC1, b)
	require.NoError(t, err)
	return m
}

func randBGR(t *testing.T, rng *rand.Rand, rows, cols int) gocv.Mat {
	t.Helper()
	b := make([]byte, rows*cols*3)
	rng.Read(b)
	m, err := gocv.NewMatFromBytes(rows, cols, gocv.MatTypeCV8UC3, b)
	require.NoError(t, err)
	return m
}

func matFloats(t *testing.T, m gocv.Mat) []float32 {
	t.Helper()
	v, err := m.DataPtrFloat32()
	require.NoError(t, err)
	return append([]float32(nil), v...)
}

// requireSameBits fails at the first element whose bits differ.
func requireSameBits(t *testing.T, want, got []float32, what string) {
	t.Helper()
	require.Len(t, got, len(want), what)
	for i := range want {
		if math.Float32bits(want[i]) != math.Float32bits(got[i]) {
			t.Fatalf("%s[%d]: want %g (%#08x), got %g (%#08x)", what, i, want[i], math.Float32bits(want[i]), got[i], math.Float32bits(got[i]))
		}
	}
}

func TestPoolAccumulateMatchesOpenCV(t *testing.T) {
	rng := rand.New(rand.NewSource(1))
	for _, sz := range poolSizes {
		for _, a := range []float64{1, 0.5, 1.0 / 15, 0.0123} {
			rows, cols := sz[1], sz[0]
			frame := randBGR(t, rng, rows, cols)
			short := randMat32(t, rng, rows, cols, 3, 0, 255)
			ref := short.Clone()
			before := matFloats(t, short)
			require.NoError(t, poolAccumulate(frame, &short, a))
			got := matFloats(t, short)

			// The formula, in float32: (1 − a)·short + a·frame.
			fa := float32(a)
			fb := 1 - fa
			want := make([]float32, len(before))
			for i, b := range frame.ToBytes() {
				want[i] = float32(fb*before[i]) + float32(fa*float32(b))
			}
			requireSameBits(t, want, got, "short mean")

			// OpenCV's accumulateWeighted computes the same blend; its
			// weight 1 − a is rounded from double, so the two may differ
			// in the last bit.
			gocv.AccumulatedWeighted(frame, &ref, a)
			for i, w := range matFloats(t, ref) {
				require.InDelta(t, w, got[i], 2e-6*math.Max(1, float64(w)), "short mean[%d] against OpenCV, a = %g", i, a)
			}
			frame.Close()
			short.Close()
			ref.Close()
		}
	}
}

// refPoolUpdate is sw_pool_update's formula (shim.h), one pixel at a time.
func refPoolUpdate(img []float32, mean, vari, gain []float32, water, hold []byte, extra, glint []float32, p poolParams) (score, con []float32) {
	n := len(water)
	score, con = make([]float32, n), make([]float32, n)
	noise2 := float32(p.noise2)
	aBg, aFg, below := float32(p.aMean), float32(p.aSlow), float32(p.learnBelow)
	for x := 0; x < n; x++ {
		if water[x] == 0 {
			continue
		}
		var d, sum, sumExp float32
		for c := 0; c < 3; c++ {
			i := 3*x + c
			gc := gain[i]
			e := float32(gc * mean[i])
			r := img[i] - e
			v := vari[i]
			if extra != nil {
				v += extra[i]
			}
			d += float32(r*r) / (float32(float32(gc*gc)*v) + noise2)
			sum += img[i]
			sumExp += e
		}
		score[x] = d
		if glint != nil && glint[x] >= p.glintMin && sum > sumExp {
			score[x] = 0
		}
		if sumExp > 1 {
			con[x] = (sum - sumExp) / sumExp
		}
		if !p.learn || hold[x] != 0 {
			continue
		}
		a := aFg
		if score[x] < below {
			a = aBg
		}
		if a <= 0 {
			continue
		}
		av := min(1, float32(a*p.varGain))
		for c := 0; c < 3; c++ {
			i := 3*x + c
			gc := gain[i]
			if !(gc > 1e-3) {
				gc = 1e-3
			}
			r := img[i]/gc - mean[i]
			mean[i] += float32(a * r)
			cp := float32(p.varClip * (vari[i] + noise2))
			vari[i] += float32(av * (min(float32(r*r), cp) - vari[i]))
		}
	}
	return score, con
}

func TestPoolUpdateMatchesFormula(t *testing.T) {
	rng := rand.New(rand.NewSource(2))
	cases := []struct {
		name          string
		img8          bool
		extra, glints bool
		learn         bool
	}{
		{"float image, score only", false, false, false, false},
		{"float image, learning", false, false, false, true},
		{"float image, structure and glints, learning", false, true, true, true},
		{"8-bit image, structure and glints, learning", true, true, true, true},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			for _, sz := range poolSizes {
				rows, cols := sz[1], sz[0]
				var img gocv.Mat
				if tc.img8 {
					img = randBGR(t, rng, rows, cols)
				} else {
					img = randMat32(t, rng, rows, cols, 3, 0, 255)
				}
				defer img.Close()
				mean := randMat32(t, rng, rows, cols, 3, 0, 255)
				defer mean.Close()
				vari := randMat32(t, rng, rows, cols, 3, 0, 60)
				defer vari.Close()
				// Gains from 0 (the floor of 1e-3 takes over when learning) to 1.6.
				gain := randMat32(t, rng, rows, cols, 3, -0.1, 1.6)
				defer gain.Close()
				gv, err := gain.DataPtrFloat32()
				require.NoError(t, err)
				for i := range gv {
					gv[i] = max(gv[i], 0)
				}
				water := randMask(t, rng, rows, cols, 0.8)
				defer water.Close()
				hold := randMask(t, rng, rows, cols, 0.1)
				defer hold.Close()
				extra, glint := gocv.NewMat(), gocv.NewMat()
				if tc.extra {
					extra.Close()
					extra = randMat32(t, rng, rows, cols, 3, 0, 20)
				}
				if tc.glints {
					glint.Close()
					glint = randMat32(t, rng, rows, cols, 1, 0, 0.2)
				}
				defer extra.Close()
				defer glint.Close()
				p := poolParams{noise2: 4, aMean: 1.0 / 300, aSlow: 1.0 / 3000, learnBelow: 9,
					varClip: varClip, varGain: varGain, glintMin: glintMin, learn: tc.learn}

				var imgF []float32
				if tc.img8 {
					for _, b := range img.ToBytes() {
						imgF = append(imgF, float32(b))
					}
				} else {
					imgF = matFloats(t, img)
				}
				wantMean, wantVar := matFloats(t, mean), matFloats(t, vari)
				var extraF, glintF []float32
				if tc.extra {
					extraF = matFloats(t, extra)
				}
				if tc.glints {
					glintF = matFloats(t, glint)
				}
				wantScore, wantCon := refPoolUpdate(imgF, wantMean, wantVar, matFloats(t, gain), water.ToBytes(), hold.ToBytes(), extraF, glintF, p)

				score, con := gocv.NewMat(), gocv.NewMat()
				defer score.Close()
				defer con.Close()
				require.NoError(t, poolUpdate(img, &mean, &vari, gain, water, hold, extra, glint, p, &score, &con))
				requireSameBits(t, wantScore, matFloats(t, score), "score")
				requireSameBits(t, wantCon, matFloats(t, con), "contrast")
				requireSameBits(t, wantMean, matFloats(t, mean), "mean")
				requireSameBits(t, wantVar, matFloats(t, vari), "variance")
			}
		})
	}
}

// refPoolGain is sw_pool_gain's formula (shim.h), one pixel at a time.
func refPoolGain(short, mean []float32, weight []byte, rows, cols, cellPx int, minShare float64) []float32 {
	nx, ny := (cols+cellPx-1)/cellPx, (rows+cellPx-1)/cellPx
	ss, ms := make([]float64, 3*nx*ny), make([]float64, 3*nx*ny)
	cnt := make([]int, nx*ny)
	for y := 0; y < rows; y++ {
		for x := 0; x < cols; x++ {
			if weight[y*cols+x] == 0 {
				continue
			}
			k := (y/cellPx)*nx + x/cellPx
			cnt[k]++
			for c := 0; c < 3; c++ {
				ss[3*k+c] += float64(short[3*(y*cols+x)+c])
				ms[3*k+c] += float64(mean[3*(y*cols+x)+c])
			}
		}
	}
	r := make([]float32, 3*nx*ny)
	for i := range r {
		r[i] = 1
	}
	ok := make([]bool, nx*ny)
	have := 0
	for cy := 0; cy < ny; cy++ {
		for cx := 0; cx < nx; cx++ {
			k := cy*nx + cx
			cw, ch := min(cellPx, cols-cx*cellPx), min(cellPx, rows-cy*cellPx)
			if float64(cnt[k]) < max(1, minShare*float64(cw*ch)) {
				continue
			}
			good := true
			for c := 0; c < 3; c++ {
				if !(ms[3*k+c] > 1e-3*float64(cnt[k])) {
					good = false
				}
			}
			if !good {
				continue
			}
			for c := 0; c < 3; c++ {
				r[3*k+c] = float32(ss[3*k+c] / ms[3*k+c])
			}
			ok[k] = true
			have++
		}
	}
	if have > 0 {
		next := append([]bool(nil), ok...)
		for pass := 0; have < nx*ny && pass < nx+ny; pass++ {
			for cy := 0; cy < ny; cy++ {
				for cx := 0; cx < nx; cx++ {
					k := cy*nx + cx
					if ok[k] {
						continue
					}
					var acc [3]float64
					n := 0
					for dy := -1; dy <= 1; dy++ {
						for dx := -1; dx <= 1; dx++ {
							x2, y2 := cx+dx, cy+dy
							if x2 < 0 || y2 < 0 || x2 >= nx || y2 >= ny || !ok[y2*nx+x2] {
								continue
							}
							for c := 0; c < 3; c++ {
								acc[c] += float64(r[3*(y2*nx+x2)+c])
							}
							n++
						}
					}
					if n == 0 {
						continue
					}
					for c := 0; c < 3; c++ {
						r[3*k+c] = float32(acc[c] / float64(n))
					}
					next[k] = true
				}
			}
			have = 0
			for k := range ok {
				ok[k] = next[k]
				if ok[k] {
					have++
				}
			}
		}
	}
	g := make([]float32, 3*rows*cols)
	at := func(v float32, hi int) (int, int, float32) {
		v = min(max(v, 0), float32(hi))
		i0 := int(v)
		return i0, min(i0+1, hi), v - float32(i0)
	}
	for y := 0; y < rows; y++ {
		y0, y1, ty := at(float32(float32(float32(y)+0.5)/float32(cellPx))-0.5, ny-1)
		for x := 0; x < cols; x++ {
			x0, x1, tx := at(float32(float32(float32(x)+0.5)/float32(cellPx))-0.5, nx-1)
			for c := 0; c < 3; c++ {
				a := float32(r[3*(y0*nx+x0)+c]*(1-tx)) + float32(r[3*(y0*nx+x1)+c]*tx)
				b := float32(r[3*(y1*nx+x0)+c]*(1-tx)) + float32(r[3*(y1*nx+x1)+c]*tx)
				g[3*(y*cols+x)+c] = float32(a*(1-ty)) + float32(b*ty)
			}
		}
	}
	return g
}

func TestPoolGainMatchesFormula(t *testing.T) {
	rng := rand.New(rand.NewSource(3))
	for _, sz := range poolSizes {
		for _, cell := range []int{1, 4, 40} {
			// Sparse weights leave cells to be filled from their neighbours.
			for _, share := range []float64{0.9, 0.1} {
				rows, cols := sz[1], sz[0]
				short := randMat32(t, rng, rows, cols, 3, 0, 255)
				mean := randMat32(t, rng, rows, cols, 3, 1, 255)
				weight := randMask(t, rng, rows, cols, share)
				want := refPoolGain(matFloats(t, short), matFloats(t, mean), weight.ToBytes(), rows, cols, cell, 0.25)
				gain := gocv.NewMat()
				require.NoError(t, poolGain(short, mean, weight, cell, 0.25, &gain))
				requireSameBits(t, want, matFloats(t, gain), "gain")
				for _, m := range []gocv.Mat{short, mean, weight, gain} {
					m.Close()
				}
			}
		}
	}
}

func TestPoolGlintMatchesFormula(t *testing.T) {
	rng := rand.New(rand.NewSource(4))
	for _, sz := range poolSizes {
		// 0 and 256 are outside what a byte can hold: every pixel glints, or none.
		for _, level := range []int{0, 1, 200, 255, 256} {
			rows, cols := sz[1], sz[0]
			rate, prev := gocv.NewMat(), gocv.NewMat()
			n := rows * cols
			wantRate, wantPrev := make([]float32, n), make([]byte, n)
			const a = 1.0 / 45
			for frame := 0; frame < 4; frame++ {
				img := randBGR(t, rng, rows, cols)
				// The formula (shim.h): a pixel glints when a channel is at
				// or above level; rate += a (toggled − rate).
				b := img.ToBytes()
				for i := 0; i < n; i++ {
					var g byte
					if int(b[3*i]) >= level || int(b[3*i+1]) >= level || int(b[3*i+2]) >= level {
						g = 1
					}
					var toggled float32
					if g != wantPrev[i] {
						toggled = 1
					}
					wantRate[i] += float32(float32(a) * (toggled - wantRate[i]))
					wantPrev[i] = g
				}
				require.NoError(t, poolGlint(img, &rate, &prev, a, level))
				requireSameBits(t, wantRate, matFloats(t, rate), "glint rate")
				require.Equal(t, wantPrev, prev.ToBytes(), "glinting pixels, level %d", level)
				img.Close()
			}
			rate.Close()
			prev.Close()
		}
	}
}
