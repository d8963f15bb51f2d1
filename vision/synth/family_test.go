package synth

import (
	"context"
	"crypto/sha256"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"sync"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"

	"stillwater/vision/refdata"
)

// drawFrames renders the given frames of s in order without encoding and
// returns copies of them with their truths.
func drawFrames(t testing.TB, s Scene, idx ...int) (*wRenderer, [][]byte, []FrameTruth) {
	t.Helper()
	require.NoError(t, s.Validate())
	r := newWRenderer(s)
	var frames [][]byte
	var truths []FrameTruth
	for _, i := range idx {
		ft, err := r.frame(i)
		require.NoError(t, err)
		frames = append(frames, append([]byte(nil), r.out...))
		truths = append(truths, ft)
	}
	return r, frames, truths
}

func TestFamilySceneDeterministic(t *testing.T) {
	cases := []struct {
		seed int64
		v    Variant
	}{
		{1, Quiet}, {2, Intruder}, {3, CameraFault}, {TuningSeedMax, Intruder}, {GateSeedMin, Quiet},
	}
	for _, tc := range cases {
		t.Run(fmt.Sprintf("%s-%d", tc.v, tc.seed), func(t *testing.T) {
			a, b := FamilyScene(tc.seed, tc.v), FamilyScene(tc.seed, tc.v)
			require.Equal(t, a, b, "same seed and variant, same scene")
			assert.NotEqual(t, CacheKey(a), CacheKey(FamilyScene(tc.seed+1, tc.v)), "another seed, another scene")
			assert.NotEqual(t, CacheKey(a), CacheKey(FamilyScene(tc.seed, (tc.v+1)%3)), "another variant, another scene")
			// Two renders of a short, small version draw the same frames
			// and labels.
			a.Width, a.Height, a.Duration = 320, 180, 1
			a.World.Lens = drawLens(320, 180, a.Camera.HFOVDeg, a.World.Lens.Fy/a.World.Lens.Fx, 0.5, 0.2, 0, 0, 0, 0, 0)
			ra, fa, ta := drawFrames(t, a, 0, 4, 9)
			rb, fb, tb := drawFrames(t, a, 0, 4, 9)
			assert.Equal(t, ta, tb)
			assert.Equal(t, ra.labels("x"), rb.labels("x"))
			for i := range fa {
				assert.Equal(t, sha256.Sum256(fa[i]), sha256.Sum256(fb[i]), "frame %d", i)
			}
		})
	}
}

func TestSeedRangesDisjoint(t *testing.T) {
	assert.Less(t, TuningSeedMin, TuningSeedMax)
	assert.Less(t, GateSeedMin, GateSeedMax)
	assert.Less(t, TuningSeedMax, GateSeedMin, "the gate range starts after the tuning range")
	for _, tc := range []struct {
		seed int64
		gate bool
	}{{TuningSeedMin, false}, {TuningSeedMax, false}, {TuningSeedMax + 1, false}, {GateSeedMin, true}, {GateSeedMax, true}, {GateSeedMax + 1, false}} {
		assert.Equal(t, tc.gate, IsGateSeed(tc.seed), "seed %d", tc.seed)
	}
	// The per-part streams of tuning and gate seeds do not coincide: no
	// gate scene repeats a tuning scene's draws.
	seen := map[int64]int64{}
	for _, seed := range []int64{1, 2, 3, 99_999, 50_000} {
		seen[newDraw(seed, Intruder, "camera").Int63()] = seed
	}
	for seed := GateSeedMin; seed < GateSeedMin+2000; seed++ {
		v := newDraw(seed, Intruder, "camera").Int63()
		_, dup := seen[v]
		require.False(t, dup, "gate seed %d draws the camera of tuning seed %d", seed, seen[v])
	}
}

// span tracks the smallest and largest value seen.
type span struct{ lo, hi float64 }

func (s *span) add(v float64) {
	if v < s.lo {
		s.lo = v
	}
	if v > s.hi {
		s.hi = v
	}
}

func newSpan() *span { return &span{math.Inf(1), math.Inf(-1)} }

// TestFamilyRangesCovered draws many tuning seeds and checks that each
// parameter stays inside its range and reaches close to both ends, and
// that every kind of a categorical draw occurs.
func TestFamilyRangesCovered(t *testing.T) {
	const n = 500
	spans := map[string]*span{}
	add := func(k string, v float64) {
		if spans[k] == nil {
			spans[k] = newSpan()
		}
		spans[k].add(v)
	}
	kinds := map[string]map[string]int{}
	count := func(k, v string) {
		if kinds[k] == nil {
			kinds[k] = map[string]int{}
		}
		kinds[k][v]++
	}
	for seed := int64(1); seed <= int64(n); seed++ {
		for _, v := range []Variant{Quiet, Intruder, CameraFault} {
			s := FamilyScene(seed, v)
			require.NoError(t, s.Validate(), "seed %d %s", seed, v)
			w := s.World
			cam := newLensCam(s.Camera, w.Lens)
			add("camera height m", s.Camera.Height)
			add("hfov deg", cam.hfov(s.Width))
			add("k1", w.Lens.Dist[0])
			add("pool length m", s.PoolLength)
			add("pool width m", s.PoolWidth)
			for _, d := range w.Site.Depth.D {
				add("depth m", d)
			}
			add("caustics", w.Water.Caustics)
			add("glitter", w.Water.Glitter)
			add("wind slope", w.Wind.Slope)
			add("fps", s.FPS)
			count("size", fmt.Sprintf("%dx%d", s.Width, s.Height))
			count("floor", w.Site.Floor.Kind)
			count("lanes", fmt.Sprint(w.Site.Floor.Lanes > 0))
			count("codec", w.Encoding.Codec)
			count("mount", mount(s))
			count("night", fmt.Sprint(w.Light.Night))
			count("lamps at night", fmt.Sprint(w.Light.Night && len(w.Lamps) > 0))
			count("clouds", fmt.Sprint(w.Clouds != nil))
			if c := w.Clouds; c != nil {
				add("cloud speed m/s", c.SpeedMS)
			}
			for _, g := range w.Wind.Gusts {
				add("gust gain", g.Gain)
			}
			for _, l := range w.Leaves {
				add("leaf area m2", l.AreaM2)
			}
			for _, b := range w.Birds {
				count("bird", fmt.Sprint("on water ", b.OnWater))
			}
			count("walker", fmt.Sprint(len(w.Walkers) > 0))
			for _, f := range w.Faults {
				count("fault", f.Kind)
			}
			// An installer sees the whole pool: the corners are in the
			// raw picture.
			for _, c := range []([2]float64){{0, 0}, {s.PoolLength, 0}, {s.PoolLength, s.PoolWidth}, {0, s.PoolWidth}} {
				u, vv, ok := cam.project(c[0], c[1], 0)
				require.True(t, ok && u > 0 && vv > 0 && u < float64(s.Width) && vv < float64(s.Height), "seed %d %s: corner %v at (%.0f, %.0f)", seed, v, c, u, vv)
			}
			if v != Intruder {
				require.Empty(t, s.Intruders, "seed %d %s: nobody in the water", seed, v)
				continue
			}
			require.Len(t, s.Intruders, 1)
			c := s.Intruders[0]
			add("child age months", float64(c.AgeMonths))
			count("entry side", entrySide(s, c))
			switch {
			case c.Depth > 0:
				count("pose", "submerged")
				add("submerged contrast", c.Contrast)
			case c.Lying:
				count("pose", "lying")
			default:
				count("pose", "upright")
			}
			count("suit like the water", fmt.Sprint(waterLike(c.Look.Suit)))
			count("long still", fmt.Sprint(s.Duration >= 240))
			add("skin luminance", lum(c.Look.Skin))
			entry := childEntry(c, s.PoolLength, s.PoolWidth)
			require.Less(t, entry, s.Duration-15, "seed %d: the child is in the water for at least 15 s", seed)
			require.GreaterOrEqual(t, entry, 5.0, "seed %d: the child gets in after the first seconds", seed)
		}
	}
	for _, tc := range []struct {
		name   string
		lo, hi float64 // the range the family is built to cover (common practice for home pools and cameras)
		reach  float64 // fraction of the range each end must be reached within
	}{
		{"camera height m", 2.5, 6, 0.05},
		{"hfov deg", 60, 110, 0.05},
		{"pool length m", 6, 12, 0.05},
		{"pool width m", 3, 5, 0.08},
		{"depth m", 0.9, 2.5, 0.08},
		{"caustics", 0, 1, 0.05},
		{"glitter", 0, 1, 0.05},
		{"cloud speed m/s", 2, 10, 0.08},
		{"leaf area m2", 0.003, 0.02, 0.05},
		{"child age months", 12, 48, 0.05},
		{"submerged contrast", 0.2, 0.5, 0.1},
		{"gust gain", 1.5, 4, 0.1},
		{"fps", 10, 20, 0},
	} {
		t.Run(tc.name, func(t *testing.T) {
			sp := spans[tc.name]
			require.NotNil(t, sp, "never drawn")
			tol := 0.015 * (tc.hi - tc.lo) // drawn values are rounded or measured
			assert.GreaterOrEqual(t, sp.lo, tc.lo-tol)
			assert.LessOrEqual(t, sp.hi, tc.hi+tol)
			assert.LessOrEqual(t, sp.lo, tc.lo+tc.reach*(tc.hi-tc.lo), "low end not reached")
			assert.GreaterOrEqual(t, sp.hi, tc.hi-tc.reach*(tc.hi-tc.lo), "high end not reached")
		})
	}
	assert.Less(t, spans["k1"].hi, 0.0, "every lens has barrel distortion (k1 < 0)")
	assert.Greater(t, spans["skin luminance"].hi-spans["skin luminance"].lo, 0.3, "pale to dark skin")
	for _, tc := range []struct {
		name string
		want []string
	}{
		{"size", []string{"640x360", "640x480", "704x576", "960x540", "1280x720"}},
		{"floor", []string{"plaster", "tiles", "pebble", "liner"}},
		{"lanes", []string{"true", "false"}},
		{"codec", []string{"mjpeg", "mpeg4", "h264"}},
		{"mount", []string{"side", "corner"}},
		{"night", []string{"true", "false"}},
		{"lamps at night", []string{"true"}},
		{"clouds", []string{"true", "false"}},
		{"bird", []string{"on water true", "on water false"}},
		{"walker", []string{"true", "false"}},
		{"fault", []string{FaultBlack, FaultFrozen, FaultNoise}},
		{"entry side", []string{"y=0", "y=W", "x=0", "x=L"}},
		{"pose", []string{"upright", "lying", "submerged"}},
		{"suit like the water", []string{"true", "false"}},
		{"long still", []string{"true", "false"}},
	} {
		for _, k := range tc.want {
			assert.Positive(t, kinds[tc.name][k], "%s: never drew %q (drew %v)", tc.name, k, kinds[tc.name])
		}
	}
}

// mount says whether the camera stands behind a side or a corner.
func mount(s Scene) string {
	out := 0
	if s.Camera.X < 0 || s.Camera.X > s.PoolLength {
		out++
	}
	if s.Camera.Y < 0 || s.Camera.Y > s.PoolWidth {
		out++
	}
	if out == 2 {
		return "corner"
	}
	return "side"
}

// entrySide is the pool edge the child's path crosses first.
func entrySide(s Scene, c Child) string {
	p := c.Path[0]
	switch {
	case p.Y < 0:
		return "y=0"
	case p.Y > s.PoolWidth:
		return "y=W"
	case p.X < 0:
		return "x=0"
	}
	return "x=L"
}

// waterLike reports a blue, green or turquoise suit: blue or green is its
// strongest channel and red is weak.
func waterLike(c RGB) bool {
	return c[2] < 0.6*math.Max(c[0], c[1]) && math.Max(c[0], c[1]) > 0.3
}

// TestWHOBodyAndFootprint checks the body sizes against the WHO Child
// Growth Standards medians (length/height and head circumference for age)
// and the drawn child's top-down area against the ranges derived from them
// in ../shared/data.md: about 0.02–0.06 m² upright (head and shoulders)
// and 0.11–0.17 m² lying at the surface.
func TestWHOBodyAndFootprint(t *testing.T) {
	for _, tc := range []struct {
		months       float64
		girl         bool
		heightM, hcM float64
	}{
		{12, false, 0.757, 0.461}, {24, true, 0.864, 0.472}, {36, false, 0.961, 0.495}, {48, true, 1.027, 0.493},
		{30, false, (0.878 + 0.961) / 2, (0.483 + 0.495) / 2},
	} {
		b := BodyForAge(tc.months, tc.girl)
		assert.InDelta(t, tc.heightM, b.HeightM, 1e-9, "%g months", tc.months)
		assert.InDelta(t, tc.hcM/math.Pi, b.HeadM, 1e-9, "%g months", tc.months)
	}
	s := small(FamilyScene(2, Intruder), 160, 90)
	r := newWRenderer(s) // only its pool and its scratch are used
	for _, tc := range []struct {
		name   string
		lying  bool
		months int
		spread float64
		lo, hi float64
	}{
		// The derived ranges are rough (head and shoulders; a flat
		// outline). The drawn body, ellipsoids with limbs, covers the
		// upright range and the lying one up to about 0.22 m² for a
		// median 48-month-old (1.03 m long), a third above the derived
		// upper end, so the lying bounds are 0.09–0.23 m².
		{"upright 12 months", false, 12, 0, 0.02, 0.06},
		{"upright 48 months", false, 48, 0, 0.02, 0.06},
		{"lying 12 months", true, 12, 0, 0.09, 0.23},
		{"lying 48 months", true, 48, 0, 0.09, 0.23},
		{"lying 48 months, arms out", true, 48, 1, 0.09, 0.26},
	} {
		t.Run(tc.name, func(t *testing.T) {
			look := ChildLook{Scale: 1, Spread: tc.spread}
			// Still in the middle of the pool from the start.
			c := Child{Path: []Waypoint{{T: 0, X: s.PoolLength / 2, Y: s.PoolWidth / 2}}, AgeMonths: tc.months, Lying: tc.lying, Contrast: 1, Look: &look}
			r.objs.prims, r.objs.objs = r.objs.prims[:0], r.objs.objs[:0]
			r.t = 5
			cs := r.addChild(c, 0, 5)
			require.True(t, cs.inWater)
			occ := r.occupation(cs)
			refdata.Report(t, "%s: top-down area %.3f m²", tc.name, occ.Area)
			assert.GreaterOrEqual(t, occ.Area, tc.lo)
			assert.LessOrEqual(t, occ.Area, tc.hi)
			assert.InDelta(t, s.PoolLength/2, occ.X, 0.25)
			assert.InDelta(t, s.PoolWidth/2, occ.Y, 0.25)
		})
	}
}

// TestLabelledChildOnDrawnChild renders family children with and without
// the child (the rest of the frame is then bit-identical: every part of
// the scene draws from its own random stream) and checks that the
// labelled position, projected through the labelled lens, lands on pixels
// the child changed.
func TestLabelledChildOnDrawnChild(t *testing.T) {
	type pose struct {
		name  string
		lying bool
		depth float64
		con   float64
	}
	cases := []struct {
		seed  int64
		night bool
		p     pose
	}{
		{2, false, pose{"upright", false, 0, 1}},
		{5, false, pose{"lying", true, 0, 1}},
		{6, false, pose{"submerged", true, 0.6, 0.4}},
		{11, true, pose{"lying at night", true, 0, 1}},
	}
	for _, tc := range cases {
		seed, p := tc.seed, tc.p
		t.Run(fmt.Sprintf("seed %d %s", seed, p.name), func(t *testing.T) {
			s := FamilyScene(seed, Intruder)
			require.Equal(t, tc.night, s.World.Light.Night)
			if testing.Short() {
				s = small(s, 480, 270)
			}
			s.World.Walkers, s.World.Birds, s.World.Leaves = nil, nil, nil
			c := s.Intruders[0]
			c.Lying, c.Depth, c.Contrast, c.SinkDur = p.lying, p.depth, p.con, 0
			x, y := s.PoolLength*0.45, s.PoolWidth*0.55
			c.Path = []Waypoint{{T: 0, X: x - 0.5, Y: y}, {T: 1, X: x, Y: y}}
			c.Enter = 0
			s.Intruders = []Child{c}
			frame := int(3 * s.FPS)
			r, with, truths := drawFrames(t, s, frame)
			empty := s
			empty.Intruders = nil
			_, without, _ := drawFrames(t, empty, frame)
			occ := truths[0].Intruder
			require.NotNil(t, occ, "the child is in the water")
			u, v, ok := r.cam.project(occ.X, occ.Y, 0)
			require.True(t, ok)
			iu, iv := int(math.Round(u)), int(math.Round(v))
			require.True(t, iu >= 1 && iv >= 1 && iu < s.Width-1 && iv < s.Height-1, "labelled position (%.1f, %.1f) in the picture", u, v)
			// The mean change over the 3×3 pixels around the labelled
			// point: a surface child replaces the water; a submerged one
			// at 40 % contrast shifts it less.
			var diff float64
			for dv := -1; dv <= 1; dv++ {
				for du := -1; du <= 1; du++ {
					i := 3 * ((iv+dv)*s.Width + iu + du)
					for ch := 0; ch < 3; ch++ {
						diff += math.Abs(float64(with[0][i+ch]) - float64(without[0][i+ch]))
					}
				}
			}
			diff /= 27
			refdata.Report(t, "%s at (%.2f, %.2f) m, pixel (%.1f, %.1f): mean change %.1f grey levels", p.name, occ.X, occ.Y, u, v, diff)
			want := 12.0
			if p.depth > 0 {
				want = 3
			}
			assert.Greater(t, diff, want)
			// Far from the child nothing changed but the child's shadow.
			fu, fv := (iu+s.Width/2)%s.Width, (iv+s.Height/2)%s.Height
			i := 3 * (fv*s.Width + fu)
			assert.Equal(t, without[0][i:i+3], with[0][i:i+3], "pixel (%d, %d) away from the child", fu, fv)
		})
	}
}

func TestCachedRendersOnce(t *testing.T) {
	s := FamilyScene(4, Quiet)
	s.Width, s.Height, s.Duration = 320, 180, 1
	s.World.Lens = drawLens(320, 180, s.Camera.HFOVDeg, 1, 0.5, 0.2, 0, 0, 0, 0, 0)
	dir := t.TempDir()
	var wg sync.WaitGroup
	type res struct {
		video, labels string
		fi            os.FileInfo
		err           error
	}
	out := make([]res, 3)
	for k := range out {
		wg.Add(1)
		go func(k int) {
			defer wg.Done()
			v, l, tr, err := Cached(context.Background(), s, dir)
			out[k] = res{video: v, labels: l, err: err}
			if err == nil {
				out[k].fi, out[k].err = os.Stat(v)
				assert.Equal(t, 10, tr.Frames)
			}
		}(k)
	}
	wg.Wait()
	for k := range out {
		require.NoError(t, out[k].err)
		assert.Equal(t, out[0].video, out[k].video)
		// A second render would have replaced the file.
		assert.True(t, os.SameFile(out[0].fi, out[k].fi), "caller %d saw another file", k)
	}
	fi, err := os.Stat(out[0].video)
	require.NoError(t, err)
	assert.True(t, os.SameFile(out[0].fi, fi))
	tr, err := ReadTruth(out[0].labels)
	require.NoError(t, err)
	assert.Equal(t, filepath.Base(out[0].video), tr.Clip)
	require.NotNil(t, tr.Lens)
	assert.Equal(t, s.World.Lens, *tr.Lens)
	left, err := filepath.Glob(filepath.Join(dir, "*.tmp*"))
	require.NoError(t, err)
	assert.Empty(t, left, "no temporary files left")
}

func TestWriteSheet(t *testing.T) {
	dir := t.TempDir()
	var scenes []Scene
	for _, v := range []Variant{Quiet, Intruder, CameraFault} {
		s := small(FamilyScene(7, v), 320, 180)
		s.Duration = 1
		scenes = append(scenes, s)
	}
	p := filepath.Join(dir, "sheet.png")
	require.NoError(t, WriteSheet(context.Background(), p, scenes, []float64{0, 1}, 160))
	m := gocv.IMRead(p, gocv.IMReadColor)
	defer m.Close()
	assert.Equal(t, [2]int{2 * 160, 3 * 90}, [2]int{m.Cols(), m.Rows()})
	err := WriteSheet(context.Background(), filepath.Join(dir, "sheet"), scenes, []float64{0}, 160)
	assert.ErrorContains(t, err, ".png")
	named := Default()
	assert.Error(t, WriteSheet(context.Background(), p, []Scene{named}, []float64{0}, 160), "a named scene is not a family scene")
}
