package main

import (
	"bytes"
	"context"
	"encoding/json"
	"io"
	"log/slog"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/santhosh-tekuri/jsonschema/v6"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"golang.org/x/sync/errgroup"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/demo"
	"stillwater/cmd/stillwater/internal/tuning"
	"stillwater/vision/refdata"
	"stillwater/vision/synth"
)

// renderChild returns a 14 s child clip (entry at 8 s, floating: see
// floatingChild) and its labels
// from the render cache (see cachedClip); dir is not used.
func renderChild(t *testing.T, dir string) (clip, labels string, truth synth.Truth) {
	t.Helper()
	cache, err := synth.CacheDir()
	require.NoError(t, err)
	clip, labels, truth, err = synth.Cached(context.Background(), childClip(), cache)
	require.NoError(t, err)
	return clip, labels, truth
}

// childClip is the scene renderChild renders.
func childClip() synth.Scene {
	s, _ := tuning.ScenarioByName("child", 7)
	s.Duration = 14
	tuning.FloatingChild(&s)
	return s
}

func schemaFor(t *testing.T, kind string) *jsonschema.Schema {
	t.Helper()
	raw, err := alert.Schema(kind)
	require.NoError(t, err)
	doc, err := jsonschema.UnmarshalJSON(bytes.NewReader(raw))
	require.NoError(t, err)
	c := jsonschema.NewCompiler()
	c.DefaultDraft(jsonschema.Draft2020)
	url := "urn:stillwater:alert:" + kind + ":v1"
	require.NoError(t, c.AddResource(url, doc))
	s, err := c.Compile(url)
	require.NoError(t, err)
	return s
}

// TestReplayMatchesDaemon replays a generated clip and holds each line
// against what a subscriber of the live daemon (serve with the embedded
// bus, via demo) receives for the same clip: the same targets in the same
// frames, tracks and positions. Every payload must also satisfy its wire
// schema, and a second replay must give the same bytes.
func TestReplayMatchesDaemon(t *testing.T) {
	if testing.Short() {
		t.Skip("renders a 14 s clip and runs it three times")
	}
	dir := t.TempDir()
	clip, labels, truth := renderChild(t, dir)
	out := filepath.Join(dir, "r.jsonl")
	var stderr bytes.Buffer
	require.NoError(t, runReplay(context.Background(), []string{"-clip", clip, "-labels", labels, "-out", out}, io.Discard, &stderr))
	assert.Contains(t, stderr.String(), "140 frames")
	first, err := os.ReadFile(out)
	require.NoError(t, err)
	var again bytes.Buffer
	require.NoError(t, runReplay(context.Background(), []string{"-clip", clip, "-labels", labels}, &again, io.Discard))
	assert.Equal(t, string(first), again.String(), "replay output is reproducible")

	lines, err := tuning.ReadReplay(bytes.NewReader(first), out)
	require.NoError(t, err)
	require.NotEmpty(t, lines)
	schemas := map[string]*jsonschema.Schema{alert.KindTarget: schemaFor(t, alert.KindTarget), alert.KindCleared: schemaFor(t, alert.KindCleared)}
	var replayed []alert.Target
	for _, l := range lines {
		var k struct {
			Kind  string `json:"kind"`
			Frame int    `json:"frame"`
		}
		require.NoError(t, json.Unmarshal(l.Msg, &k))
		assert.Equal(t, "stillwater.clip."+k.Kind, l.Subject)
		assert.Equal(t, k.Frame, l.Frame)
		assert.InDelta(t, float64(l.Frame)/truth.FPS, l.Media, 1e-6)
		v, err := jsonschema.UnmarshalJSON(bytes.NewReader(l.Msg))
		require.NoError(t, err)
		require.Contains(t, schemas, k.Kind)
		assert.NoError(t, schemas[k.Kind].Validate(v), "line for frame %d", l.Frame)
		if k.Kind == alert.KindTarget {
			var tg alert.Target
			require.NoError(t, json.Unmarshal(l.Msg, &tg))
			replayed = append(replayed, tg)
		}
	}

	res, err := demo.Clip(context.Background(), truth, clip, t.TempDir(), false, slog.New(slog.NewTextHandler(io.Discard, nil)), io.Discard)
	require.NoError(t, err)
	require.Equal(t, len(res.Targets), len(replayed), "target messages: daemon against replay")
	for i, d := range res.Targets {
		r := replayed[i]
		assert.Equal(t, d.Frame, r.Frame)
		assert.Equal(t, d.Event, r.Event)
		assert.Equal(t, d.Track, r.Track)
		assert.Equal(t, d.Surface, r.Surface, "frame %d", d.Frame)
		assert.Equal(t, d.Area, r.Area)
	}
}

// TestReplayZoneSuppresses replays the child clip through a config whose
// zone covers the child's whole path: no target may come out, while the
// same config without the zone raises one (the control).
func TestReplayZoneSuppresses(t *testing.T) {
	if testing.Short() {
		t.Skip("renders a 14 s clip and replays it twice")
	}
	dir := t.TempDir()
	clip, _, truth := renderChild(t, dir)
	var corners []string
	for _, c := range truth.Corners {
		corners = append(corners, "["+ftoa(c.Pixel[0])+", "+ftoa(c.Pixel[1])+"]")
	}
	cfg := "data_dir: " + dir + "\ncameras:\n  - id: pool\n    source: unused.avi\n    pool: {length_m: 8, width_m: 4}\n    corners: [" + strings.Join(corners, ", ") + "]\n"
	zone := "    zones:\n      - name: shallow-end\n        pool_m: [[0.5, 0.3], [4.2, 0.3], [4.2, 3.0], [0.5, 3.0]]\n"
	tests := []struct {
		name     string
		cfg      string
		wantNone bool
	}{
		{"no zone", cfg, false},
		{"zone over the path", cfg + zone, true},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			p := filepath.Join(t.TempDir(), "c.yaml")
			require.NoError(t, os.WriteFile(p, []byte(tt.cfg), 0o644))
			var out bytes.Buffer
			require.NoError(t, runReplay(context.Background(), []string{"-clip", clip, "-config", p, "-camera", "pool"}, &out, io.Discard))
			lines, err := tuning.ReadReplay(&out, "out")
			require.NoError(t, err)
			if tt.wantNone {
				assert.Empty(t, lines)
				return
			}
			require.NotEmpty(t, lines)
			assert.Equal(t, "stillwater.pool.target", lines[0].Subject)
		})
	}
}

func ftoa(v float64) string { b, _ := json.Marshal(v); return string(b) }

func TestReplayFlags(t *testing.T) {
	dir := t.TempDir()
	lp := filepath.Join(dir, "l.json")
	require.NoError(t, os.WriteFile(lp, []byte(`{"format":"stillwater.labels/v1","fps":10,"frames":10,"pool":{"length_m":8,"width_m":4},"corners":[],"presence":[]}`), 0o644))
	tests := []struct {
		name    string
		args    []string
		wantErr string
	}{
		{"no clip", []string{"-labels", lp}, "-clip is required"},
		{"no source of settings", []string{"-clip", "x.avi"}, "give -labels or -config"},
		{"both", []string{"-clip", "x.avi", "-labels", lp, "-config", lp}, "not both"},
		{"labels without corners", []string{"-clip", "x.avi", "-labels", lp}, "0 corners; want A, B, C, D"},
		{"missing clip", []string{"-clip", filepath.Join(dir, "none.avi"), "-labels", writeLabels(t, dir)}, "none.avi"},
		{"bad override", []string{"-clip", "x.avi", "-labels", writeLabels(t, dir), "-persist", "-1s"}, "persist"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
			defer cancel()
			err := runReplay(ctx, tt.args, io.Discard, io.Discard)
			require.Error(t, err)
			assert.Contains(t, err.Error(), tt.wantErr)
		})
	}
}

// writeLabels writes a minimal valid label file with a square-on pool.
func writeLabels(t *testing.T, dir string) string {
	t.Helper()
	p := filepath.Join(dir, "ok.json")
	require.NoError(t, os.WriteFile(p, []byte(`{"format":"stillwater.labels/v1","fps":10,"frames":10,"pool":{"length_m":8,"width_m":4},
"corners":[{"name":"A","pool_m":[0,0],"pixel":[100,300]},{"name":"B","pool_m":[8,0],"pixel":[500,300]},{"name":"C","pool_m":[8,4],"pixel":[500,100]},{"name":"D","pool_m":[0,4],"pixel":[100,100]}],"presence":[]}`), 0o644))
	return p
}

// plazaCamera is an approximate ground-plane calibration of vtest.avi from
// Debian's opencv-doc examples (real footage: people walking on a campus
// plaza, seen from an upper floor, 768×576 at 10 fps). Four points on the
// paving are taken as an 8.5 m × 7 m rectangle, a size estimated from the
// walkers' apparent height of about 1.7 m (common practice), not measured.
func plazaCamera(t testing.TB, zones ...config.ZoneConfig) config.CameraConfig {
	t.Helper()
	clip, err := refdata.Path("vtest.avi")
	if err != nil {
		t.Skip(err)
	}
	return config.CameraConfig{
		ID: "plaza", Source: clip,
		CalibrationConfig: config.CalibrationConfig{
			Pool:    config.PoolConfig{Length: 8.5, Width: 7},
			Corners: [][2]float64{{250, 300}, {720, 300}, {640, 150}, {330, 150}},
		},
		Detect: plazaDetect(),
		Zones:  zones,
	}
}

// plazaDetect is the default detection with the pool's walking-shadow
// rules relaxed: on the plaza the walkers are the subject, and an adult
// walks at 1.2–1.5 m/s (common practice), above the pool's max_speed_mps.
func plazaDetect() config.DetectConfig {
	d := config.DefaultDetect()
	d.MaxSpeed = 3
	d.DeckRadius = -1
	d.Companion = -1
	return d
}

// TestReplayRealFootage runs the daemon's pipeline over real video with a
// zone drawn on the paving: the people walking into the watched area must
// raise tracks, none inside an exclusion zone, and the tracker must give
// them walking speeds.
func TestReplayRealFootage(t *testing.T) {
	if testing.Short() {
		t.Skip("replays 80 s of real video twice")
	}
	// The left third of the watched paving is excluded.
	excl := config.ZoneConfig{Name: "left", PoolM: [][2]float64{{0, 0}, {3, 0}, {3, 7}, {0, 7}}}
	run := func(cam config.CameraConfig) ([]alert.Target, error) {
		var buf bytes.Buffer
		if _, err := tuning.ReplayClip(context.Background(), cam, "stillwater", &buf, slog.New(slog.NewTextHandler(io.Discard, nil))); err != nil {
			return nil, err
		}
		lines, err := tuning.ReadReplay(&buf, "vtest")
		if err != nil {
			return nil, err
		}
		var out []alert.Target
		for _, l := range lines {
			var tg alert.Target
			if err := json.Unmarshal(l.Msg, &tg); err != nil {
				return nil, err
			}
			if tg.Kind == alert.KindTarget {
				out = append(out, tg)
			}
		}
		return out, nil
	}
	inZone := func(tg alert.Target) bool { return tg.Surface.X < 3 }

	// The two replays are independent: one per core.
	var all, zoned, walked []alert.Target
	var g errgroup.Group
	plain, withZone := plazaCamera(t), plazaCamera(t, excl)
	// The tracker's speeds are checked on MOG2's blobs: the default
	// detector's one-second mean draws a walker as a streak 1.3 m long,
	// whose centre lags and starts late, which suits water, not a plaza.
	mog := plazaCamera(t, excl)
	mog.Detect = config.MergeDetect(config.DefaultDetect(), config.DetectConfig{Method: "mog2"})
	g.SetLimit(2)
	g.Go(func() (err error) { all, err = run(plain); return err })
	g.Go(func() (err error) { zoned, err = run(withZone); return err })
	g.Go(func() (err error) { walked, err = run(mog); return err })
	require.NoError(t, g.Wait())
	tracks := func(ts []alert.Target) int {
		ids := map[int]bool{}
		for _, tg := range ts {
			ids[tg.Track] = true
		}
		return len(ids)
	}
	medSpeed := func(ts []alert.Target) float64 {
		var speeds []float64
		for _, tg := range ts {
			speeds = append(speeds, math.Hypot(tg.Velocity.X, tg.Velocity.Y))
		}
		return tuning.Quantile(speeds, 0.5)
	}
	med := medSpeed(walked)
	t.Logf("vtest: %d tracks (%d targets) without the zone, %d tracks with it; median target speed %.2f m/s (mog2, %d tracks), %.2f m/s (default detector)", tracks(all), len(all), tracks(zoned), med, tracks(walked), medSpeed(zoned))
	// Several people walk across the paving during the clip's 80 s.
	assert.GreaterOrEqual(t, tracks(zoned), 8, "walkers on the paving raise tracks")
	// Free walking speed of adults is about 1.2–1.4 m/s (from memory; the
	// US MUTCD times crossings at 3.5 ft/s, 1.07 m/s). The calibration is
	// approximate and some walkers stop to talk, hence the wide band.
	assert.True(t, med >= 0.4 && med <= 2.0, "median speed %.2f m/s is not a walking speed", med)
	for _, tg := range walked {
		assert.False(t, inZone(tg), "mog2: target of track %d at (%.2f, %.2f) m inside the exclusion zone", tg.Track, tg.Surface.X, tg.Surface.Y)
	}
	n := 0
	for _, tg := range all {
		if inZone(tg) {
			n++
		}
	}
	require.Positive(t, n, "control: without the zone, walkers are reported on its part of the paving")
	for _, tg := range zoned {
		assert.False(t, inZone(tg), "target of track %d at (%.2f, %.2f) m inside the exclusion zone", tg.Track, tg.Surface.X, tg.Surface.Y)
	}
}

// BenchmarkReplayRealFootage measures the daemon's pipeline on vtest.avi
// (768×576, 10 fps, processed at the default 640 px width). Real time is
// 10 frames/s.
func BenchmarkReplayRealFootage(b *testing.B) {
	cam := plazaCamera(b)
	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	var frames int
	var busy time.Duration
	for i := 0; i < b.N; i++ {
		st, err := tuning.ReplayClip(context.Background(), cam, "stillwater", io.Discard, log)
		if err != nil {
			b.Fatal(err)
		}
		frames += st.Frames
		busy += st.Elapsed
	}
	fps := float64(frames) / busy.Seconds()
	b.ReportMetric(fps, "frames/s")
	b.Logf("vtest.avi: %d frames in %.1f s: %.1f frames/s (real time is 10)", frames, busy.Seconds(), fps)
	if fps < 10 {
		b.Fatalf("%.1f frames/s is slower than the clip's 10 frames/s", fps)
	}
}
