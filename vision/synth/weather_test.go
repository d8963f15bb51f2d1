package synth

import (
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/vision/refdata"
)

// firstScene returns the first tuning scene of a variant that ok accepts.
func firstScene(t *testing.T, v Variant, ok func(Scene) bool) Scene {
	t.Helper()
	for seed := int64(1); seed < 2000; seed++ {
		if s := FamilyScene(seed, v); ok(s) {
			return s
		}
	}
	t.Fatal("no such scene in the first 2000 seeds")
	return Scene{}
}

// small shrinks a scene's picture for quick tests, drawing the lens again
// for the new size.
func small(s Scene, w, h int) Scene {
	s.Width, s.Height = w, h
	s.World.Lens = drawLens(w, h, s.Camera.HFOVDeg, 1, 0.5, 0.2, 0, 0, 0, 0, 0)
	return s
}

// TestCloudShadowEdge checks that cloud shadows move across the site at
// the drawn speed, that an edge crosses the pool centre at Cross, and that
// auto exposure undoes part, not all, of the change in light.
func TestCloudShadowEdge(t *testing.T) {
	s := firstScene(t, Quiet, func(s Scene) bool {
		c := s.World.Clouds
		return c != nil && c.Cross > 8 && c.Cross < s.Duration-15 && c.Block > 0.7 && s.World.Light.SunElevDeg > 40
	})
	c := s.World.Clouds
	ct := newCloudTex(c, s.PoolLength/2, s.PoolWidth/2)
	dir := deg(c.DirDeg)
	// The field at time t+dt, dt later and v·dt further along, is the
	// same field: within a cell's worth of the soft edge.
	var moved, still float64
	n := 0
	for dt := 0.5; dt <= 2; dt += 0.5 {
		for x := -5.0; x < s.PoolLength+5; x += 0.7 {
			for y := -5.0; y < s.PoolWidth+5; y += 0.7 {
				a := ct.sunAt(x, y, c.Cross)
				moved += math.Abs(ct.sunAt(x+c.SpeedMS*dt*math.Cos(dir), y+c.SpeedMS*dt*math.Sin(dir), c.Cross+dt) - a)
				still += math.Abs(ct.sunAt(x, y, c.Cross+dt) - a)
				n++
			}
		}
	}
	moved /= float64(n)
	still /= float64(n)
	refdata.Report(t, "cloud at %.1f m/s: the shadow field differs by %.4f where it moved to, by %.4f in place", c.SpeedMS, moved, still)
	assert.Less(t, moved, 0.03)
	assert.Greater(t, still, 3*moved)
	// An edge crosses the pool centre at Cross: the light there differs
	// a few metres' travel before and after.
	dt := 4 / c.SpeedMS
	cx, cy := s.PoolLength/2, s.PoolWidth/2
	before, after := ct.sunAt(cx, cy, c.Cross-dt), ct.sunAt(cx, cy, c.Cross+dt)
	assert.Greater(t, math.Abs(before-after), c.Block/2, "light at the centre %.2f before, %.2f after", before, after)

	// Auto exposure: a straight shadow edge sweeps the whole site; compare
	// the change in the scene's light with the change in the picture.
	s = small(s, 320, 180)
	r := newWRenderer(s)
	ux, uy := math.Cos(dir), math.Sin(dir)
	for q := 0; q < cloudN; q++ {
		for p := 0; p < cloudN; p++ {
			// Along the motion, sunlit ahead of the edge, shaded behind it.
			a := (float64(p)*ux + float64(q)*uy) * cloudCell
			r.clouds.sun[q*cloudN+p] = float32(1 - c.Block*smoothstep(-1, 1, math.Mod(a+1000*cloudN*cloudCell, cloudN*cloudCell)-cloudN*cloudCell/2))
		}
	}
	frames := func(t0, t1 float64) (light, shown float64) {
		for i := int(t0 * s.FPS); i <= int(t1*s.FPS); i++ {
			_, err := r.frame(i)
			require.NoError(t, err)
			light = r.lumSum / float64(r.lumN)
			shown = light * r.gain
		}
		return light, shown
	}
	// Find when the site is lit and when it is shaded.
	var tLit, tDark float64 = -1, -1
	for tt := 0.0; tt < s.Duration; tt += 0.5 {
		v := r.clouds.sunAt(cx, cy, tt)
		if v > 0.99 && tLit < 0 {
			tLit = tt
		}
		if tLit >= 0 && v < 1-c.Block+0.01 {
			tDark = tt
			break
		}
	}
	require.True(t, tLit >= 0 && tDark > tLit, "the edge passes")
	l1, s1 := frames(tLit, tLit)
	settle := tDark + 6*s.World.Light.ExposureTau
	l2, s2 := frames(tLit+1/s.FPS, settle)
	lightRatio, shownRatio := l2/l1, s2/s1
	want := math.Pow(lightRatio, 1-s.World.Light.ExposureComp)
	refdata.Report(t, "scene light ×%.2f under the shadow; %.1f s later the picture's light ×%.2f (auto exposure undoing %.0f %% of the change: expected ×%.2f)",
		lightRatio, settle-tLit, shownRatio, 100*s.World.Light.ExposureComp, want)
	assert.Less(t, lightRatio, 0.85, "the cloud darkens the scene")
	assert.Less(t, shownRatio, 0.98, "the picture darkens")
	assert.Greater(t, shownRatio, lightRatio*1.05, "but exposure makes up part of it")
	assert.InDelta(t, math.Log(want), math.Log(shownRatio), 0.1)
}

// TestGustRaisesRipples checks that a gust makes the water change more
// from frame to frame than calm air does.
func TestGustRaisesRipples(t *testing.T) {
	s := firstScene(t, Quiet, func(s Scene) bool {
		if s.World.Light.Night || len(s.World.Wind.Gusts) != 1 {
			return false
		}
		g := s.World.Wind.Gusts[0]
		return g.Gain > 2.5 && g.Start > 10 && g.Start+g.Dur < s.Duration-2 && s.World.Clouds == nil
	})
	s = small(s, 320, 180)
	s.World.Leaves, s.World.Birds, s.World.Walkers = nil, nil, nil
	g := s.World.Wind.Gusts[0]
	mid := g.Start + g.Dur/2
	// Water pixels inside the gust's band at its height.
	r0 := newWRenderer(s)
	r0.gust.update(s.World.Wind, mid, r0.poolMid)
	inBand := map[int]bool{}
	for _, p := range r0.wp {
		if float64(r0.gust.g[p.gust]) > 1+0.6*(g.Gain-1) {
			inBand[int(p.i)] = true
		}
	}
	require.NotEmpty(t, inBand)
	change := func(t0 float64) float64 {
		i := int(t0 * s.FPS)
		_, f, _ := drawFrames(t, s, i, i+1)
		var sum float64
		for p := range inBand {
			for ch := 0; ch < 3; ch++ {
				sum += math.Abs(float64(f[1][3*p+ch]) - float64(f[0][3*p+ch]))
			}
		}
		return sum / float64(3*len(inBand))
	}
	calm, gust := change(g.Start-5), change(mid)
	refdata.Report(t, "gust ×%.1f: water changes %.2f grey levels a frame in it, %.2f before it", g.Gain, gust, calm)
	assert.Greater(t, gust, 1.5*calm)
}
