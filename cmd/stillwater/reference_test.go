package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gopkg.in/yaml.v3"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/demo"
	"stillwater/cmd/stillwater/internal/watch"
	"stillwater/vision"
	"stillwater/vision/synth"
)

func TestReferenceRoundTrip(t *testing.T) {
	g := &vision.Rectification{Cols: 3, Rows: 2, Cell: 0.025, MapX: []float32{1, 2, 3, 4, 5, 6}, MapY: []float32{1, 1, 1, 2, 2, 2}, Water: []byte{1, 1, 2, 1, 1, 2}}
	ref := vision.Reference{Cols: 3, Rows: 2, Frames: 100}
	for i := 0; i < 6; i++ {
		ref.Mean = append(ref.Mean, float32(10*i)+0.3, float32(100+i), 200.7)
		ref.Var = append(ref.Var, float32(i*i), 4, 0.25)
	}
	dir := t.TempDir()
	_, _, err := watch.LoadReference(dir, "pool", g)
	require.ErrorIs(t, err, watch.ErrNoReference)

	now := time.Date(2026, 7, 1, 12, 0, 0, 0, time.UTC)
	require.NoError(t, watch.SaveReference(dir, "pool", g, ref, now, "test"))
	got, meta, err := watch.LoadReference(dir, "pool", g)
	require.NoError(t, err)
	assert.Equal(t, now, meta.Saved)
	assert.Equal(t, 100, got.Frames)
	for i := range ref.Mean {
		// 8-bit pictures: the mean to the nearest grey level, the spread
		// to the nearest 1/spreadScale.
		assert.InDelta(t, ref.Mean[i], got.Mean[i], 0.5, "mean %d", i)
		assert.InDelta(t, math.Sqrt(float64(ref.Var[i])), math.Sqrt(float64(got.Var[i])), 0.5/watch.SpreadScale+1e-6, "spread %d", i)
	}
	// Another calibration (one map value moved): not used.
	g2 := *g
	g2.MapX = append([]float32(nil), g.MapX...)
	g2.MapX[0] = 1.5
	_, _, err = watch.LoadReference(dir, "pool", &g2)
	assert.ErrorContains(t, err, "another calibration")
	// Another camera has none.
	_, _, err = watch.LoadReference(dir, "deck", g)
	assert.ErrorIs(t, err, watch.ErrNoReference)
}

// childFromStart renders the "child" scene (seed 11) with the child already
// in the water, floating still at (3.0, 1.8) m, from the first frame, 12 s,
// and the same scene empty. It returns both clips and the labels.
func childFromStart(t *testing.T) (child, empty string, truth synth.Truth, dir string) {
	t.Helper()
	truth, child, dir = renderScene(t, "child", 11, func(s *synth.Scene) {
		s.Duration = 12
		s.Intruders[0].Enter = 0
		s.Intruders[0].Path = []synth.Waypoint{{T: 0, X: 3.0, Y: 1.8}}
		s.Intruders[0].Lying = true
	})
	_, empty, _ = renderScene(t, "empty", 11, func(s *synth.Scene) { s.Duration = 12 })
	return child, empty, truth, dir
}

// TestDaemonStartsFromEmptyPoolReference runs the daemon on a clip whose
// child is in the water from its first frame. With the empty-pool
// reference that "stillwater calibrate -data-dir" saves (from a clip of the
// empty pool), the child is reported within 2.5 s of the start (the short
// mean settles for 1.5 s, then the alarm's 0.7 s); started on the empty
// pool with the reference, nothing is reported. Without a reference the
// model warms up on the picture with the child in it and learns the
// child as water: the limit the reference removes.
func TestDaemonStartsFromEmptyPoolReference(t *testing.T) {
	if testing.Short() {
		t.Skip("renders two 12 s clips and plays them in real time")
	}
	child, empty, truth, dir := childFromStart(t)
	corners := ""
	for _, c := range truth.Corners {
		corners += fmt.Sprintf("%g,%g ", c.Pixel[0], c.Pixel[1])
	}
	data := filepath.Join(dir, "data")
	var err error
	var out, errOut bytes.Buffer
	err = run(context.Background(), []string{"calibrate", "-frame", empty, "-corners", corners,
		"-length", fmt.Sprint(truth.Pool.Length), "-width", fmt.Sprint(truth.Pool.Width),
		"-data-dir", data, "-id", "demo", "-learn", "5s", "-out", filepath.Join(dir, "cal.yaml")}, &out, &errOut)
	require.NoError(t, err, errOut.String())
	assert.Contains(t, out.String(), "empty pool:")
	mean, _, _ := watch.ReferencePaths(data, "demo")
	require.FileExists(t, mean)

	// The daemon's camera takes the calibration calibrate wrote.
	y, err := os.ReadFile(filepath.Join(dir, "cal.yaml"))
	require.NoError(t, err)
	var cal config.CalibrationConfig
	require.NoError(t, yaml.Unmarshal(y, &cal))
	targets := func(clip string, withRef bool) []alert.Target {
		cfg := demo.Config(truth, clip, dir, true)
		cfg.Cameras[0].CalibrationConfig = cal
		cfg.DataDir = data
		if !withRef {
			cfg.DataDir = filepath.Join(t.TempDir(), "data")
		}
		require.NoError(t, cfg.Validate())
		log, stop := startDaemon(t, cfg)
		time.Sleep(13 * time.Second) // the clip plays in real time
		require.NoError(t, stop())
		var out []alert.Target
		for _, m := range log.bySubject("stillwater.demo.target") {
			var tg alert.Target
			require.NoError(t, json.Unmarshal(m.Data, &tg))
			out = append(out, tg)
		}
		return out
	}
	t.Run("child there at start", func(t *testing.T) {
		tg := targets(child, true)
		require.NotEmpty(t, tg, "the child in the water at start was never reported")
		first := float64(tg[0].Frame) / truth.FPS
		t.Logf("first target at %.2f s of media, (%.2f, %.2f) m", first, tg[0].Surface.X, tg[0].Surface.Y)
		assert.LessOrEqual(t, first, 2.5)
		assert.InDelta(t, 3.0, tg[0].Surface.X, 0.5)
		assert.InDelta(t, 1.8, tg[0].Surface.Y, 0.5)
	})
	t.Run("empty pool at start", func(t *testing.T) {
		assert.Empty(t, targets(empty, true), "a target on the empty pool in the first seconds")
	})
	t.Run("no reference", func(t *testing.T) {
		assert.Empty(t, targets(child, false), "without a reference the child present at start is learned as water")
	})
	// The daemon keeps the reference it started from: the files are there.
	_, meta, err := loadReferenceMeta(data, "demo")
	require.NoError(t, err)
	assert.Equal(t, "saved by stillwater calibrate", meta.Note)
	require.NoError(t, os.RemoveAll(data))
}

// loadReferenceMeta reads a reference's description only.
func loadReferenceMeta(dataDir, camID string) (string, watch.ReferenceMeta, error) {
	_, _, metaPath := watch.ReferencePaths(dataDir, camID)
	b, err := os.ReadFile(metaPath)
	if err != nil {
		return metaPath, watch.ReferenceMeta{}, err
	}
	var m watch.ReferenceMeta
	return metaPath, m, json.Unmarshal(b, &m)
}
