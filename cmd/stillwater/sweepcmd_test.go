package main

import (
	"bytes"
	"context"
	"encoding/csv"
	"image/png"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestParseLists(t *testing.T) {
	v, err := parseFloats("threshold", "12, 16,24")
	require.NoError(t, err)
	assert.Equal(t, []float64{12, 16, 24}, v)
	_, err = parseFloats("threshold", "12,x")
	assert.ErrorContains(t, err, `-threshold "12,x": "x" is not a positive number`)
	d, err := parseDurations("persist", "500ms,1s")
	require.NoError(t, err)
	assert.Equal(t, []time.Duration{500 * time.Millisecond, time.Second}, d)
	_, err = parseDurations("persist", "0s")
	assert.ErrorContains(t, err, "not a positive duration")
}

// TestSweepPersistence sweeps persistence on a generated child clip: the
// first alert cannot come before the track has lasted the persistence, so
// raising it from 0.5 s to 1.5 s must delay the first alert by about 1 s
// (the hit-ratio rule may add a frame or two either way).
func TestSweepPersistence(t *testing.T) {
	if testing.Short() {
		t.Skip("renders a 14 s clip and replays it twice")
	}
	dir := t.TempDir()
	clip, labels, _ := renderChild(t, dir)
	csvPath, pngPath := filepath.Join(dir, "s.csv"), filepath.Join(dir, "s.png")
	var out bytes.Buffer
	err := runSweep(context.Background(), []string{"-persist", "500ms,1500ms", "-csv", csvPath, "-png", pngPath, clip, labels}, &out, io.Discard)
	require.NoError(t, err)
	assert.Contains(t, out.String(), "best within 0 false alarms/h: method meanvar, threshold 60, min_area_m2 0.03, min_score 50, persist 500ms")

	f, err := os.Open(csvPath)
	require.NoError(t, err)
	defer f.Close()
	rows, err := csv.NewReader(f).ReadAll()
	require.NoError(t, err)
	require.Len(t, rows, 3)
	col := map[string]int{}
	for i, h := range rows[0] {
		col[h] = i
	}
	delay := func(r []string) float64 {
		v, err := strconv.ParseFloat(r[col["delay_max_s"]], 64)
		require.NoError(t, err, "row %v", r)
		return v
	}
	d1, d2 := delay(rows[1]), delay(rows[2])
	t.Logf("first-alert delay: %.2f s at 0.5 s persistence, %.2f s at 1.5 s", d1, d2)
	assert.GreaterOrEqual(t, d1, 0.5)
	assert.InDelta(t, 1.0, d2-d1, 0.25)
	assert.Equal(t, "1", rows[1][col["detected"]])

	pf, err := os.Open(pngPath)
	require.NoError(t, err)
	defer pf.Close()
	img, err := png.Decode(pf)
	require.NoError(t, err)
	assert.Greater(t, img.Bounds().Dx(), 600)
}
