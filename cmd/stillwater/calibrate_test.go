package main

import (
	"bytes"
	"context"
	"flag"
	"fmt"
	"image"
	"image/png"
	"math"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gopkg.in/yaml.v3"

	"stillwater/cmd/stillwater/internal/calibrate"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/testkit"
	"stillwater/vision/synth"
)

func readPNG(t *testing.T, path string) image.Image {
	t.Helper()
	f, err := os.Open(path)
	require.NoError(t, err)
	defer f.Close()
	img, err := png.Decode(f)
	require.NoError(t, err)
	return img
}

// green returns the green channel (0–255) of img at (x, y).
func green(img image.Image, x, y int) float64 {
	_, g, _, _ := img.At(x, y).RGBA()
	return float64(g >> 8)
}

func red(img image.Image, x, y int) float64 {
	r, _, _, _ := img.At(x, y).RGBA()
	return float64(r >> 8)
}

// edge returns the first position along a scan where red crosses 150
// (turquoise water has red about 70, the coping about 225), or -1.
func edge(n int, at func(i int) float64, fromWater bool) int {
	for i := 0; i < n; i++ {
		if (at(i) > 150) == fromWater {
			return i
		}
	}
	return -1
}

// TestCalibrateCommand runs stillwater calibrate on a generated scene and
// checks its output against the generator's geometry: the YAML loads as a
// calibration, the estimated camera height is within 10 % of the
// generator's pose, and in the rectified view the pool's water/coping
// boundary sits where the pool corners should be and the floor's painted
// lines are straight and level.
func TestCalibrateCommand(t *testing.T) {
	dir := t.TempDir()
	s := synth.Default()
	s.Duration = 0.5
	clip := filepath.Join(dir, "pool.avi")
	truth, err := synth.Render(context.Background(), s, clip, "")
	require.NoError(t, err)
	var corners []string
	for _, c := range truth.Corners {
		corners = append(corners, fmt.Sprintf("%.0f,%.0f", c.Pixel[0], c.Pixel[1]))
	}
	out := filepath.Join(dir, "cal.yaml")
	over, rect := filepath.Join(dir, "overlay.png"), filepath.Join(dir, "rect.png")
	var stdout, stderr bytes.Buffer
	err = runCalibrate(context.Background(), []string{
		"-frame", clip, "-corners", strings.Join(corners, " "), "-length", "8", "-width", "4",
		"-hfov", "70", "-shallow", "1.0", "-deep", "1.8", "-out", out, "-overlay", over, "-rectified", rect,
	}, &stdout, &stderr)
	require.NoError(t, err, stderr.String())
	t.Logf("calibrate output:\n%s", stdout.String())

	m := regexp.MustCompile(`estimated at x (-?[\d.]+) m, y (-?[\d.]+) m, ([\d.]+) m above`).FindStringSubmatch(stdout.String())
	require.NotNil(t, m, "camera line")
	h, _ := strconv.ParseFloat(m[3], 64)
	assert.InDelta(t, s.Camera.Height, h, 0.1*s.Camera.Height, "printed height vs the generator's 5 m")
	assert.Regexp(t, `scale:\s+0\.0\d\d m/px at the near end \(corner [AD]\), 0\.0\d\d m/px at the far end \(corner [BC]\)`, stdout.String())

	b, err := os.ReadFile(out)
	require.NoError(t, err)
	var cfg config.CalibrationConfig
	dec := yaml.NewDecoder(bytes.NewReader(b))
	dec.KnownFields(true)
	require.NoError(t, dec.Decode(&cfg), string(b))
	assert.Contains(t, string(b), "corners:\n  - [")
	require.NoError(t, config.ValidateCalibration("calibration", cfg))
	cal, err := config.NewCalibration(config.CameraConfig{ID: "t", CalibrationConfig: cfg})
	require.NoError(t, err)
	_, refracts := cal.Depth()
	assert.True(t, refracts)
	assert.Equal(t, [2]int{640, 480}, cfg.Frame)
	ref := readPNG(t, cfg.ReferenceFrame)
	assert.Equal(t, image.Pt(640, 480), ref.Bounds().Size())
	assert.Equal(t, image.Pt(640, 480), readPNG(t, over).Bounds().Size())

	// Rectified view: 100 px/m, 1 m margin, so corner A is at (100, 100)
	// and C at (900, 500) in a 1000 × 600 image.
	img := readPNG(t, rect)
	require.Equal(t, image.Pt(1000, 600), img.Bounds().Size())
	midY, midX := 300, 500
	left := edge(1000, func(i int) float64 { return red(img, 500-i, midY) }, true)
	right := edge(1000, func(i int) float64 { return red(img, 500+i, midY) }, true)
	top := edge(600, func(i int) float64 { return red(img, midX, 300-i) }, true)
	bottom := edge(600, func(i int) float64 { return red(img, midX, 300+i) }, true)
	t.Logf("water edges in the rectified view: x %d…%d px (want 100…900), y %d…%d px (want 100…500)", 500-left, 500+right, 300-top, 300+bottom)
	assert.InDelta(t, 100, 500-left+1, 3)
	assert.InDelta(t, 900, 500+right, 3)
	assert.InDelta(t, 100, 300-top+1, 3)
	assert.InDelta(t, 500, 300+bottom, 3)

	// The lane lines painted along the floor at y = 1, 2, 3 m (rows 200,
	// 300, 400) from x = 0.8 to 7.2 m: dark in green against the water.
	for _, want := range []float64{200, 300, 400} {
		var xs, ys []float64
		for x := 200; x <= 800; x += 20 {
			var sum, n float64
			for y := int(want) - 25; y <= int(want)+25; y++ {
				if green(img, x, y) < 115 {
					sum += float64(y)
					n++
				}
			}
			require.Greater(t, n, 3.0, "no lane line at column %d near row %.0f", x, want)
			xs, ys = append(xs, float64(x)), append(ys, sum/n)
		}
		slope, icept, rms := fitLine(xs, ys)
		t.Logf("lane line at row %.0f: slope %.5f, residual %.2f px, row at x=500 %.2f", want, slope, rms, icept+500*slope)
		assert.Less(t, rms, 0.5, "straightness, px")
		assert.Less(t, math.Abs(slope), 0.003, "level")
		// The line's centre is at the painted y; +0.5 for the pixel centre.
		assert.InDelta(t, want, icept+500*slope, 1.5)
	}
}

// fitLine is the least-squares y = a·x + b with the RMS residual.
func fitLine(xs, ys []float64) (a, b, rms float64) {
	var sx, sy, sxx, sxy float64
	n := float64(len(xs))
	for i := range xs {
		sx += xs[i]
		sy += ys[i]
		sxx += xs[i] * xs[i]
		sxy += xs[i] * ys[i]
	}
	a = (n*sxy - sx*sy) / (n*sxx - sx*sx)
	b = (sy - a*sx) / n
	for i := range xs {
		d := ys[i] - (a*xs[i] + b)
		rms += d * d
	}
	return a, b, math.Sqrt(rms / n)
}

func TestCalibrateUsageErrors(t *testing.T) {
	cases := []struct {
		name string
		args []string
		want string
	}{
		{"no frame", []string{"-corners", "1,2 3,4 5,6 7,8"}, "-frame is required"},
		{"no corners", []string{"-frame", "x.png"}, "-corners or -corners-file"},
		{"bad ppm", []string{"-frame", "x.png", "-corners", "1,1", "-ppm", "1"}, "-ppm"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			var so, se bytes.Buffer
			err := runCalibrate(context.Background(), tc.args, &so, &se)
			require.ErrorIs(t, err, errUsage)
			assert.Contains(t, err.Error(), tc.want)
		})
	}
	_, err := calibrate.ParsePairs("1,2 3")
	assert.ErrorContains(t, err, `point 2 "3": want x,y`)
	var so, se bytes.Buffer
	err = runCalibrate(context.Background(), []string{"-frame", "/nonexistent/f.png", "-corners", "1,1 2,2 3,3 4,4", "-length", "8", "-width", "4"}, &so, &se)
	assert.ErrorContains(t, err, "cannot read the image")
}

var updateReadme = flag.Bool("update-readme", false, "rewrite the README calibration images in testdata/readme")

// TestCalibrateReadmeImages draws the README's calibration pictures from
// a generated scene (noise off, so the PNGs stay small) and, with
// -update-readme, copies them to testdata/readme.
func TestCalibrateReadmeImages(t *testing.T) {
	dir := t.TempDir()
	s := synth.Default()
	s.Duration, s.Noise, s.Glints = 0.5, 0, 0
	clip := filepath.Join(dir, "pool.avi")
	truth, err := synth.Render(context.Background(), s, clip, "")
	require.NoError(t, err)
	var corners []string
	for _, c := range truth.Corners {
		corners = append(corners, fmt.Sprintf("%.0f,%.0f", c.Pixel[0], c.Pixel[1]))
	}
	over, rect := filepath.Join(dir, "calibrate-overlay.png"), filepath.Join(dir, "calibrate-rectified.png")
	var so, se bytes.Buffer
	require.NoError(t, runCalibrate(context.Background(), []string{
		"-frame", clip, "-corners", strings.Join(corners, " "), "-length", "8", "-width", "4", "-hfov", "70",
		"-shallow", "1.0", "-deep", "1.8", "-overlay", over, "-rectified", rect, "-ppm", "60",
	}, &so, &se), se.String())
	for _, p := range []string{over, rect} {
		st, err := os.Stat(p)
		require.NoError(t, err)
		assert.Less(t, st.Size(), int64(150<<10), "%s: README images stay under 150 KB", filepath.Base(p))
		if *updateReadme {
			b, err := os.ReadFile(p)
			require.NoError(t, err)
			require.NoError(t, os.WriteFile(filepath.Join("..", "..", "testdata", "readme", filepath.Base(p)), b, 0o644))
		}
	}
}

// TestCalibrateSwapsCrossedCorners: C and D clicked the wrong way round
// are put back in order in the written calibration, with a note.
func TestCalibrateSwapsCrossedCorners(t *testing.T) {
	dir := t.TempDir()
	s := synth.Default()
	s.Duration = 0.2
	clip := filepath.Join(dir, "pool.avi")
	truth, err := synth.Render(context.Background(), s, clip, "")
	require.NoError(t, err)
	px := func(i int) string {
		return fmt.Sprintf("%.0f,%.0f", truth.Corners[i].Pixel[0], truth.Corners[i].Pixel[1])
	}
	var so, se bytes.Buffer
	require.NoError(t, runCalibrate(context.Background(), []string{
		"-frame", clip, "-corners", strings.Join([]string{px(0), px(1), px(3), px(2)}, " "), "-length", "8", "-width", "4",
	}, &so, &se), se.String())
	assert.Contains(t, se.String(), "crossed order")
	assert.Contains(t, so.String(), "- ["+strings.ReplaceAll(px(2), ",", ", ")+"]\n  - ["+strings.ReplaceAll(px(3), ",", ", ")+"]")
	assert.Contains(t, se.String(), "reference:  not saved")
}

func FuzzParsePairs(f *testing.F) {
	for _, s := range []string{"1,2 3,4 5,6 7,8", "1.5,2;3,4\n5,6", "", "x,y", "1,2,3", ",", "1e309,0"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		pts, err := calibrate.ParsePairs(s)
		if err != nil {
			return
		}
		// Whatever parses must survive validation without a panic, and
		// bad numbers must be refused there.
		cfg := config.CalibrationConfig{Pool: config.PoolConfig{Length: 8, Width: 4}, Corners: pts}
		if err := config.ValidateCalibration("fuzz", cfg); err == nil {
			for _, p := range pts {
				if math.IsNaN(p[0]) || math.IsInf(p[0], 0) || p[0] < 0 {
					t.Fatalf("accepted corner %v", p)
				}
			}
		}
		_, _ = config.BuildCalibration(cfg)
	})
}

// TestCalibrateFreeform: measured points and an outline instead of corners.
func TestCalibrateFreeform(t *testing.T) {
	dir := t.TempDir()
	s := synth.Default()
	s.Duration = 0.2
	clip := filepath.Join(dir, "pool.avi")
	_, err := synth.Render(context.Background(), s, clip, "")
	require.NoError(t, err)
	var pts, outline []string
	for _, q := range [][2]float64{{0.5, 0.5}, {7.5, 0.3}, {7.8, 3.6}, {0.4, 3.5}, {4, 0.2}} {
		p := testkit.Click(t, s, q[0], q[1], 0)
		pts = append(pts, fmt.Sprintf("%g,%g=%g,%g", p.X, p.Y, q[0], q[1]))
	}
	for a := 0.0; a < 2*math.Pi-1e-9; a += math.Pi / 8 {
		p := testkit.Click(t, s, 4+3.9*math.Cos(a), 2+1.9*math.Sin(a), 0)
		outline = append(outline, fmt.Sprintf("%g,%g", p.X, p.Y))
	}
	var so, se bytes.Buffer
	require.NoError(t, runCalibrate(context.Background(), []string{
		"-frame", clip, "-points", strings.Join(pts, " "), "-outline", strings.Join(outline, " "),
		"-length", "8", "-width", "4", "-hfov", "70", "-overlay", filepath.Join(dir, "o.png"),
	}, &so, &se), se.String())
	assert.Regexp(t, `reprojection: 0\.0\d\d m RMS, worst 0\.0\d\d m, [\d.]+ px RMS over 5 points`, se.String())
	var cfg config.CalibrationConfig
	require.NoError(t, yaml.Unmarshal(so.Bytes(), &cfg))
	assert.Len(t, cfg.Reference, 5)
	assert.Len(t, cfg.Outline, 16)

	err = runCalibrate(context.Background(), []string{"-frame", clip, "-points", strings.Join(pts, " ")}, &so, &se)
	assert.ErrorContains(t, err, "-points needs -outline")
	_, err = calibrate.ParseReference("1,2=3")
	assert.ErrorContains(t, err, "want u,v=x,y")
}
