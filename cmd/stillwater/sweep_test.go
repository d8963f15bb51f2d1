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

func TestGrid(t *testing.T) {
	g := grid([]float64{12, 16}, []float64{0.01}, []time.Duration{time.Second, 2 * time.Second})
	require.Len(t, g, 4)
	assert.Equal(t, sweepPoint{Threshold: 12, MinArea: 0.01, Persist: time.Second}, g[0])
	assert.Equal(t, sweepPoint{Threshold: 16, MinArea: 0.01, Persist: 2 * time.Second}, g[3])
}

func TestBest(t *testing.T) {
	hour := 1.0
	res := func(th float64, det, fals int, delays ...float64) sweepResult {
		return sweepResult{Point: sweepPoint{Threshold: th}, Total: scoreTotal{Presences: 2, Detected: det, False: fals, FreeHours: hour, Delays: delays}}
	}
	tests := []struct {
		name   string
		rs     []sweepResult
		budget float64
		want   float64 // threshold of the winner
		ok     bool
	}{
		// 12 detects both but raises 3 false alarms in the hour; within a
		// budget of 1/h the choice is between 16 (worst delay 1.5 s) and 24
		// (one detection): 16.
		{"budget excludes the noisy one", []sweepResult{res(12, 2, 3, 0.5, 0.6), res(16, 2, 1, 1.0, 1.5), res(24, 1, 0, 1.2)}, 1, 16, true},
		{"looser budget", []sweepResult{res(12, 2, 3, 0.5, 0.6), res(16, 2, 1, 1.0, 1.5)}, 5, 12, true},
		{"same detections, smaller worst delay", []sweepResult{res(16, 2, 0, 0.9, 1.9), res(20, 2, 0, 1.1, 1.2)}, 0, 20, true},
		{"nothing within budget", []sweepResult{res(12, 2, 3)}, 0, 0, false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			b, ok := best(tt.rs, tt.budget)
			require.Equal(t, tt.ok, ok)
			if ok {
				assert.Equal(t, tt.want, b.Point.Threshold)
			}
		})
	}
}

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
