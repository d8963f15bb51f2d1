package vision

import (
	"image"
	"image/color"
	"math"
	"math/rand"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"
)

// squareGrid is a rectification of a 4 m × 2 m pool seen straight from
// above at 100 px/m in a 440×240 frame: pool metre (x, y) is pixel
// (20 + 100x, 20 + 100y); cells of 2.5 cm, 0.2 m of deck around.
func squareGrid() *Rectification {
	const cell, deck = 0.025, 0.2
	cols, rows := int(math.Round((4+2*deck)/cell)), int(math.Round((2+2*deck)/cell))
	r := &Rectification{Cols: cols, Rows: rows, Cell: cell, OriginX: -deck, OriginY: -deck, Src: image.Pt(440, 240)}
	for j := 0; j < rows; j++ {
		for i := 0; i < cols; i++ {
			x, y := -deck+(float64(i)+0.5)*cell, -deck+(float64(j)+0.5)*cell
			r.MapX = append(r.MapX, float32(20+100*x))
			r.MapY = append(r.MapY, float32(20+100*y))
			k := byte(CellDeck)
			if x >= 0 && y >= 0 && x <= 4 && y <= 2 {
				k = CellWater
			}
			r.Water = append(r.Water, k)
		}
	}
	return r
}

// poolPixels returns the pixels of a rectangle given in pool centimetres
// (bodyAt's), under squareGrid's mapping.
func poolPixels(r image.Rectangle) image.Rectangle {
	return r.Add(image.Pt(20, 20))
}

// waterScene draws frames of flat water with sensor noise and a moving
// caustic-like ripple, an optional square body and a light level; the
// caller closes each frame.
type waterScene struct {
	rng   *rand.Rand
	light float64 // 1 is full sun
	calm  bool    // no ripples: sensor noise only
	n     int
	noise []byte
}

func newWaterScene() *waterScene {
	return &waterScene{rng: rand.New(rand.NewSource(1)), light: 1}
}

// frame returns the next frame; body, in pool metres, is drawn in col.
func (s *waterScene) frame(body image.Rectangle, col color.RGBA) gocv.Mat {
	s.n++
	base := gocv.NewScalar(190*s.light, 170*s.light, 80*s.light, 0)
	m := gocv.NewMatWithSizeFromScalar(base, 240, 440, gocv.MatTypeCV8UC3)
	// Ripples: bright diagonal bands moving across, 0.3 m apart.
	for k := -10; k < 30 && !s.calm; k++ {
		x := float64(k*30+(s.n*7)%30) + 20
		gocv.Line(&m, image.Pt(int(x), 0), image.Pt(int(x)+120, 240), color.RGBA{uint8(215 * s.light), uint8(200 * s.light), uint8(110 * s.light), 0}, 3)
	}
	if !body.Empty() {
		px := poolPixels(body)
		gocv.Rectangle(&m, px, color.RGBA{uint8(float64(col.R) * s.light), uint8(float64(col.G) * s.light), uint8(float64(col.B) * s.light), 0}, -1)
	}
	if s.noise == nil {
		s.noise = make([]byte, 240*440*3)
	}
	b, _ := m.DataPtrUint8()
	for i := range b {
		v := float64(b[i]) + s.rng.NormFloat64()*2
		b[i] = uint8(math.Max(0, math.Min(255, v)))
	}
	return m
}

// body returns a square of side cm centimetres at pool (x, y) m, in
// frame pixels relative to the pool origin.
func bodyAt(x, y, side float64) image.Rectangle {
	h := side * 100 / 2
	return image.Rect(int(x*100-h), int(y*100-h), int(x*100+h), int(y*100+h))
}

// meanVarSeenFrom returns a detector on squareGrid with the camera above
// nadir (nil: position not known); the caller closes it.
func meanVarSeenFrom(t *testing.T, nadir *Point) *meanVar {
	t.Helper()
	g := squareGrid()
	g.Nadir = nadir
	fd, err := newFrameDetector(DetectorConfig{Method: "meanvar", Grid: g, MeanVar: MeanVarConfig{FPS: 10}}, image.Pt(440, 240))
	require.NoError(t, err)
	return fd.(*meanVar)
}

func newTestMeanVar(t *testing.T, ref *Reference) *meanVar {
	t.Helper()
	cfg := DetectorConfig{Method: "meanvar", Grid: squareGrid(), MeanVar: MeanVarConfig{FPS: 10}, Reference: ref}
	fd, err := newFrameDetector(cfg, image.Pt(440, 240))
	require.NoError(t, err)
	return fd.(*meanVar)
}

// run feeds n frames and returns the last frame's blobs and every frame's
// blob count.
func run(t *testing.T, d *meanVar, s *waterScene, n int, body image.Rectangle, col color.RGBA, hold func([]Blob) []image.Rectangle) ([]Blob, []int) {
	t.Helper()
	var last []Blob
	var counts []int
	var h []image.Rectangle
	for i := 0; i < n; i++ {
		f := s.frame(body, col)
		blobs, _, err := d.Detect(f, h)
		f.Close()
		require.NoError(t, err)
		last = blobs
		counts = append(counts, len(blobs))
		if hold != nil {
			h = hold(blobs)
		}
	}
	return last, counts
}

func holdAll(bs []Blob) []image.Rectangle {
	var out []image.Rectangle
	for _, b := range bs {
		out = append(out, b.Plane.Cells)
	}
	return out
}

func TestMeanVarFindsDarkerAndBrighterBodies(t *testing.T) {
	tests := []struct {
		name   string
		col    color.RGBA
		darker bool
	}{
		{"dark suit", color.RGBA{40, 50, 60, 0}, true},
		{"pale skin at night", color.RGBA{250, 235, 225, 0}, false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			d := newTestMeanVar(t, nil)
			defer d.Close()
			s := newWaterScene()
			_, counts := run(t, d, s, 80, image.Rectangle{}, color.RGBA{}, nil)
			for i, c := range counts {
				assert.Zero(t, c, "frame %d of empty water", i)
			}
			// A 0.3 m square at (2, 1) m for 2 s.
			blobs, _ := run(t, d, s, 20, bodyAt(2, 1, 0.3), tt.col, nil)
			require.Len(t, blobs, 1)
			b := blobs[0]
			assert.InDelta(t, 2.0, b.Plane.X, 0.05)
			assert.InDelta(t, 1.0, b.Plane.Y, 0.05)
			// 0.09 m², measured where it differs by half its contrast or more.
			assert.InDelta(t, 0.09, b.Features.Half, 0.03)
			assert.Equal(t, tt.darker, b.Features.Contrast < 0, "contrast %v", b.Features.Contrast)
			assert.InDelta(t, 1.0, b.Features.Wet, 1e-9)
			// The source pixel of (2, 1) m is (220, 120).
			assert.InDelta(t, 220, b.Centroid.X, 6)
			assert.InDelta(t, 120, b.Centroid.Y, 6)
		})
	}
}

func TestMeanVarLightChangeIsNotABody(t *testing.T) {
	// A cloud: the light drops by 45 % over 2 s and stays down. The local
	// illumination ratio scales the background; nothing is reported.
	d := newTestMeanVar(t, nil)
	defer d.Close()
	s := newWaterScene()
	run(t, d, s, 80, image.Rectangle{}, color.RGBA{}, nil)
	for i := 0; i < 60; i++ {
		s.light = math.Max(0.55, 1-0.45*float64(i)/20)
		f := s.frame(image.Rectangle{}, color.RGBA{})
		blobs, _, err := d.Detect(f, nil)
		f.Close()
		require.NoError(t, err)
		assert.Empty(t, blobs, "frame %d, light %.2f", i, s.light)
	}
}

func TestMeanVarHoldKeepsStillBody(t *testing.T) {
	// A still body for 60 s (10 fps), its cells held as a tracker would:
	// still found at the end, as strongly as at the start. The background
	// learns with a 30 s time constant, so an unheld body would be half
	// gone by then.
	d := newTestMeanVar(t, nil)
	defer d.Close()
	s := newWaterScene()
	run(t, d, s, 60, image.Rectangle{}, color.RGBA{}, nil)
	body := bodyAt(2.5, 1.2, 0.4)
	first, _ := run(t, d, s, 15, body, color.RGBA{40, 50, 60, 0}, holdAll)
	require.Len(t, first, 1)
	last, counts := run(t, d, s, 600, body, color.RGBA{40, 50, 60, 0}, holdAll)
	for i, c := range counts {
		require.Equal(t, 1, c, "frame %d", i)
	}
	assert.Greater(t, last[0].Features.Score, 0.8*first[0].Features.Score)
}

func TestMeanVarHoldKeepsADimmedBody(t *testing.T) {
	// On calm water, a still body 12 grey levels darker than the water in
	// each channel is found; then, over 2 s, it fades to 8 levels darker
	// (a child under a passing cloud, or sinking a little) and stays so
	// for 10 s. Its peak score falls below the threshold (about 72, then
	// about 40 on this scene). Held, it is still found, as a faint
	// candidate; not held, it is not: a faint part of the water is no
	// candidate.
	for _, tt := range []struct {
		name string
		hold func([]Blob) []image.Rectangle
		want int
	}{
		{"held", holdAll, 1},
		{"not held", nil, 0},
	} {
		t.Run(tt.name, func(t *testing.T) {
			d := newTestMeanVar(t, nil)
			defer d.Close()
			s := newWaterScene()
			s.calm = true
			run(t, d, s, 80, image.Rectangle{}, color.RGBA{}, nil)
			body := bodyAt(2.5, 1.2, 0.4)
			var h []image.Rectangle
			step := func(below float64) []Blob {
				// The water is (B, G, R) = (190, 170, 80); colours are
				// drawn as BGR.
				v := func(w float64) uint8 { return uint8(math.Round(w - below)) }
				f := s.frame(body, color.RGBA{R: v(80), G: v(170), B: v(190)})
				defer f.Close()
				blobs, _, err := d.Detect(f, h)
				require.NoError(t, err)
				if tt.hold != nil {
					h = tt.hold(blobs)
				}
				return blobs
			}
			var blobs []Blob
			for i := 0; i < 21; i++ {
				blobs = step(12)
			}
			require.Len(t, blobs, 1, "12 levels darker")
			assert.False(t, blobs[0].Features.Faint)
			assert.GreaterOrEqual(t, blobs[0].Features.Peak, d.cfg.Threshold)
			for i := 0; i < 120; i++ {
				blobs = step(math.Max(8, 12-4*float64(i)/20))
				if i < 30 {
					continue // the short mean follows for a second
				}
				require.Len(t, blobs, tt.want, "frame %d", i)
				if tt.want == 1 {
					b := blobs[0]
					assert.True(t, b.Features.Faint, "frame %d: peak %.0f", i, b.Features.Peak)
					assert.Less(t, b.Features.Peak, d.cfg.Threshold)
					assert.InDelta(t, 2.5, b.Plane.X, 0.1)
					assert.InDelta(t, 1.2, b.Plane.Y, 0.1)
				}
			}
		})
	}
}

func TestMeanVarResumeForgetsTheGap(t *testing.T) {
	// A body held still for 3 s, then the camera goes away and comes back
	// to the same picture without it (the child got out meanwhile). Kept
	// as it was, the short mean still holds the body for its next frames;
	// resumed, it reports nothing, and a body that comes back is found
	// once the short mean has settled (1.5 s).
	for _, resume := range []bool{false, true} {
		t.Run(map[bool]string{false: "kept", true: "resumed"}[resume], func(t *testing.T) {
			d := newTestMeanVar(t, nil)
			defer d.Close()
			s := newWaterScene()
			run(t, d, s, 80, image.Rectangle{}, color.RGBA{}, nil)
			body := bodyAt(2, 1, 0.4)
			blobs, _ := run(t, d, s, 30, body, color.RGBA{40, 50, 60, 0}, holdAll)
			require.Len(t, blobs, 1)
			if resume {
				require.NoError(t, d.resume())
			}
			_, counts := run(t, d, s, 3, image.Rectangle{}, color.RGBA{}, nil)
			if !resume {
				// The control: without resume the gone body is still seen.
				assert.Equal(t, []int{1, 1, 1}, counts)
				return
			}
			assert.Equal(t, []int{0, 0, 0}, counts)
			_, counts = run(t, d, s, 40, image.Rectangle{}, color.RGBA{}, nil)
			for i, c := range counts {
				assert.Zero(t, c, "frame %d after the gap", i+3)
			}
			blobs, _ = run(t, d, s, 20, body, color.RGBA{40, 50, 60, 0}, nil)
			assert.Len(t, blobs, 1, "a body after the gap")
		})
	}
}

func TestMeanVarStartsFromReference(t *testing.T) {
	// A reference learned on the empty pool lets a new detector find a body
	// that is there from its first frame, after the short mean settles
	// (1.5 s), and report nothing on the empty pool.
	learn := newTestMeanVar(t, nil)
	s := newWaterScene()
	run(t, learn, s, 100, image.Rectangle{}, color.RGBA{}, nil)
	ref, ok := learn.Reference()
	learn.Close()
	require.True(t, ok)

	t.Run("body there at start", func(t *testing.T) {
		d := newTestMeanVar(t, &ref)
		defer d.Close()
		_, counts := run(t, d, s, 25, bodyAt(1.5, 0.8, 0.3), color.RGBA{40, 50, 60, 0}, nil)
		first := -1
		for i, c := range counts {
			if c > 0 {
				first = i
				break
			}
		}
		require.GreaterOrEqual(t, first, 0, "never found")
		assert.LessOrEqual(t, time.Duration(first)*100*time.Millisecond, 2*time.Second)
	})
	t.Run("empty pool", func(t *testing.T) {
		d := newTestMeanVar(t, &ref)
		defer d.Close()
		_, counts := run(t, d, s, 50, image.Rectangle{}, color.RGBA{}, nil)
		for i, c := range counts {
			assert.Zero(t, c, "frame %d", i)
		}
	})
	t.Run("without a reference the body is learned", func(t *testing.T) {
		// The limit the reference removes: warming up (4 s) on a picture
		// with the body in it learns the body as water, and after the
		// warm-up it is not found either.
		d := newTestMeanVar(t, nil)
		defer d.Close()
		_, counts := run(t, d, s, 80, bodyAt(1.5, 0.8, 0.3), color.RGBA{40, 50, 60, 0}, nil)
		for i, c := range counts {
			assert.Zero(t, c, "frame %d", i)
		}
	})
	t.Run("wrong size", func(t *testing.T) {
		bad := ref
		bad.Cols--
		_, err := newFrameDetector(DetectorConfig{Method: "meanvar", Grid: squareGrid(), Reference: &bad}, image.Pt(440, 240))
		assert.ErrorContains(t, err, "reference")
	})
}

func TestMeanVarBodyOnDeckIsNotWet(t *testing.T) {
	// A body straddling the water's edge (x = 0): part of it on the deck.
	d := newTestMeanVar(t, nil)
	defer d.Close()
	s := newWaterScene()
	run(t, d, s, 80, image.Rectangle{}, color.RGBA{}, nil)
	blobs, _ := run(t, d, s, 20, bodyAt(0.05, 1, 0.3), color.RGBA{40, 50, 60, 0}, nil)
	require.Len(t, blobs, 1)
	assert.InDelta(t, 0.6, blobs[0].Features.Wet, 0.15)
	assert.Less(t, blobs[0].Features.Edge, 0.1)
}

func TestMeanVarFootOnTheDeck(t *testing.T) {
	// A long dark body from x = -0.18 m (on the deck, which is 0.2 m wide
	// here) to x = 0.5 m across the edge at x = 0, its centre on the water.
	// Its end nearest the camera is on the deck when the camera is beyond
	// x = 0, on the water when it is beyond x = 4.
	for _, c := range []struct {
		name  string
		nadir *Point
		foot  float64
		near  float64 // x of the near end's centre, NaN: none
	}{
		// The cells within footBand of the near end: x from -0.175 to
		// -0.025 m, on average 0.1 m from the water.
		{"camera beyond the deck end", &Point{X: -4, Y: 1}, 0.1, -0.1},
		// From 0.35 to 0.5 m.
		{"camera beyond the far end", &Point{X: 8, Y: 1}, 0, 0.425},
		{"camera position not known", nil, 0, math.NaN()},
	} {
		t.Run(c.name, func(t *testing.T) {
			d := meanVarSeenFrom(t, c.nadir)
			defer d.Close()
			s := newWaterScene()
			run(t, d, s, 80, image.Rectangle{}, color.RGBA{}, nil)
			blobs, _ := run(t, d, s, 20, image.Rect(-18, 85, 50, 115), color.RGBA{40, 50, 60, 0}, nil)
			require.Len(t, blobs, 1)
			assert.Greater(t, blobs[0].Plane.X, 0.0, "centre on the water")
			assert.InDelta(t, c.foot, blobs[0].Features.Foot, 0.03)
			if near := blobs[0].Plane.Near; math.IsNaN(c.near) {
				assert.Nil(t, near)
			} else {
				require.NotNil(t, near)
				assert.InDelta(t, c.near, near.X, 0.03)
				assert.InDelta(t, 1.0, near.Y, 0.05)
			}
		})
	}
}

func TestMeanVarPlacesAMovedBodyWhereItIsNow(t *testing.T) {
	// A dark body stands for two seconds, then moves 0.2 m along x. Two
	// frames later the short mean holds mostly its trail where it stood.
	// Across the edge at x = 0 (from x −0.15 to 0.05 m, its centre on the
	// deck, onto the water at 0.05 to 0.25 m) the candidate is placed where
	// the body is there in this frame, on the water, not at the centre of
	// what the mean holds; unless the camera stands beyond the deck end,
	// when what is there now lies beyond the centre, away from the camera,
	// where the upright part of someone standing at the edge is seen. In
	// open water (x 1.5 to 1.7 m, then 1.7 to 1.9 m) nothing changes: the
	// position is that of its strongest part, the trail.
	edge, moved := image.Rect(-15, 90, 5, 110), image.Rect(5, 90, 25, 110)
	open, swam := image.Rect(150, 90, 170, 110), image.Rect(170, 90, 190, 110)
	for _, c := range []struct {
		name       string
		nadir      *Point
		from, to   image.Rectangle
		minX, maxX float64 // where the candidate must be placed, m
	}{
		{"across the edge, camera position not known", nil, edge, moved, 0.05, 0.25},
		{"across the edge, camera beyond the far end", &Point{X: 8, Y: 1}, edge, moved, 0.05, 0.25},
		{"across the edge, camera beyond the deck end", &Point{X: -4, Y: 1}, edge, moved, -0.15, 0},
		{"in open water", nil, open, swam, 1.5, 1.7},
	} {
		t.Run(c.name, func(t *testing.T) {
			d := meanVarSeenFrom(t, c.nadir)
			defer d.Close()
			s := newWaterScene()
			col := color.RGBA{40, 50, 60, 0}
			run(t, d, s, 80, image.Rectangle{}, col, nil)
			run(t, d, s, 20, c.from, col, nil)
			blobs, _ := run(t, d, s, 2, c.to, col, nil)
			require.Len(t, blobs, 1)
			b := blobs[0]
			assert.Less(t, b.Features.Present, trailPresent, "mostly trail")
			assert.GreaterOrEqual(t, b.Plane.X, c.minX)
			assert.LessOrEqual(t, b.Plane.X, c.maxX)
			assert.InDelta(t, 1.0, b.Plane.Y, 0.05)
		})
	}
}

func TestRectificationSource(t *testing.T) {
	r := squareGrid()
	// Cell units: the centre of cell (i, j) is (i+0.5, j+0.5); pool metre
	// (2, 1) is cell units ((2+0.2)/0.025, (1+0.2)/0.025) = (88, 48).
	p, ok := r.source(88, 48)
	require.True(t, ok)
	assert.InDelta(t, 220, p.X, 1e-3)
	assert.InDelta(t, 120, p.Y, 1e-3)
	x, y := r.plane(88, 48)
	assert.InDelta(t, 2, x, 1e-9)
	assert.InDelta(t, 1, y, 1e-9)
	// Scaled to a frame twice the size, pixels double.
	s := r.scaled(image.Pt(880, 480))
	p2, _ := s.source(88, 48)
	assert.InDelta(t, 440, p2.X, 1e-3)
}

func TestEdgeDistance(t *testing.T) {
	// A 5×5 watched square in a 7×7 grid: the centre is 3 cells from the
	// nearest unwatched cell.
	w := make([]byte, 49)
	for y := 1; y < 6; y++ {
		for x := 1; x < 6; x++ {
			w[y*7+x] = 1
		}
	}
	d := edgeDistance(w, 7, 7, 0)
	assert.InDelta(t, 3, d[3*7+3], 1e-6)
	assert.InDelta(t, 1, d[1*7+3], 1e-6)
	assert.Zero(t, d[0])
}

// TestTopScore holds topScore to the nearest-rank 90th percentile (the
// smallest value at least 90 % of the values are not above; the
// nearest-rank definition of a percentile, common practice in
// statistics texts).
func TestTopScore(t *testing.T) {
	for _, tc := range []struct {
		name   string
		scores []float32
		want   float32
	}{
		{"none", nil, 0},
		{"one cell", []float32{7}, 7},
		{"ten cells: the ninth", []float32{10, 9, 8, 7, 6, 5, 4, 3, 2, 1}, 9},
		{"eleven cells: rank ceil(9.9) = 10", []float32{1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11}, 10},
		{"a single hot cell does not set it", []float32{50, 50, 50, 50, 50, 50, 50, 50, 50, 50, 50, 50, 50, 50, 50, 50, 50, 50, 50, 900}, 50},
	} {
		t.Run(tc.name, func(t *testing.T) {
			got := topScore(append([]float32(nil), tc.scores...))
			if got != tc.want {
				t.Errorf("topScore(%v) = %v, want %v", tc.scores, got, tc.want)
			}
		})
	}
}

// TestMeanVarReportsWhereMostOfTheBodyIs: a 0.4 m dark square with a
// small black patch near one side (a dark suit with black hair, say). The
// patch sets the peak score, so the part at half the peak contrast, where
// the candidate is judged (Plane.X), lies around it; the part at half the
// contrast a tenth of the cells reach takes in the whole square, and the
// shift to it (Features.ShiftX) brings the reported position back to the
// square's centre.
func TestMeanVarReportsWhereMostOfTheBodyIs(t *testing.T) {
	d := newTestMeanVar(t, nil)
	defer d.Close()
	s := newWaterScene()
	run(t, d, s, 80, image.Rectangle{}, color.RGBA{}, nil)
	body := bodyAt(2, 1, 0.4)      // x 1.8–2.2 m
	patch := bodyAt(2.14, 1, 0.08) // x 2.10–2.18 m, 4 % of the square
	var blobs []Blob
	for i := 0; i < 20; i++ {
		f := s.frame(body, color.RGBA{R: 40, G: 130, B: 150})
		gocv.Rectangle(&f, poolPixels(patch), color.RGBA{}, -1)
		var err error
		blobs, _, err = d.Detect(f, nil)
		f.Close()
		require.NoError(t, err)
	}
	require.Len(t, blobs, 1)
	b := blobs[0]
	t.Logf("judged %.3f, %.3f; shift %.3f, %.3f; half %.3f", b.Plane.X, b.Plane.Y, b.Features.ShiftX, b.Features.ShiftY, b.Features.Half)
	assert.Greater(t, b.Plane.X, 2.06, "judged near the patch")
	assert.InDelta(t, 2.0, b.Plane.X+b.Features.ShiftX, 0.03, "reported at the square's centre")
	assert.InDelta(t, 1.0, b.Plane.Y+b.Features.ShiftY, 0.03)
	assert.InDelta(t, 0.0, b.Features.ShiftY, 0.03)
}
