package vision

import (
	"fmt"
	"image"
	"io"
	"math"
	"os"
	"regexp"
	"strconv"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/vision/refdata"
	"stillwater/vision/synth"
)

// readOpenCVMatrix reads the 3×3 data block of an OpenCV FileStorage XML
// file such as H1to3p.xml.
func readOpenCVMatrix(t *testing.T, path string) [9]float64 {
	t.Helper()
	b, err := os.ReadFile(path)
	require.NoError(t, err)
	m := regexp.MustCompile(`(?s)<data>(.*?)</data>`).FindSubmatch(b)
	require.NotNil(t, m)
	f := strings.Fields(string(m[1]))
	require.Len(t, f, 9)
	var h [9]float64
	for i, s := range f {
		h[i], err = strconv.ParseFloat(s, 64)
		require.NoError(t, err)
	}
	return h
}

func readImage(t *testing.T, name string) image.Image {
	t.Helper()
	p, err := refdata.Path(name)
	require.NoError(t, err)
	img, err := GrabFrame(p, "", 0)
	require.NoError(t, err)
	return img
}

// TestDriftGraffitiGroundTruth registers the Oxford graffiti pair
// graf1.png → graf3.png (Mikolajczyk et al., "A comparison of affine
// region detectors", IJCV 2005; shipped in Debian's opencv-doc examples)
// and compares the estimate with the published ground-truth homography
// H1to3p.xml at the image corners.
func TestDriftGraffitiGroundTruth(t *testing.T) {
	p, err := refdata.Path("H1to3p.xml")
	require.NoError(t, err)
	truth := DriftResult{H: readOpenCVMatrix(t, p)}
	// The published matrix's first row (data table): graf1 (0,0) → (225.67, −77.00).
	q, _ := truth.Map(Point{0, 0})
	require.InDelta(t, 225.67, q.X, 0.01)

	ref := readImage(t, "graf1.png")
	live := readImage(t, "graf3.png")
	d, err := NewDrift(ref, DriftConfig{})
	require.NoError(t, err)
	defer d.Close()
	res, err := d.Register(live)
	require.NoError(t, err)
	b := ref.Bounds()
	worst := 0.0
	for _, c := range []Point{{0, 0}, {float64(b.Dx()), 0}, {float64(b.Dx()), float64(b.Dy())}, {0, float64(b.Dy())}} {
		a, ok1 := res.Map(c)
		w, ok2 := truth.Map(c)
		require.True(t, ok1 && ok2)
		e := math.Hypot(a.X-w.X, a.Y-w.Y)
		t.Logf("corner (%4.0f, %4.0f): estimated (%7.2f, %7.2f), ground truth (%7.2f, %7.2f), error %.2f px", c.X, c.Y, a.X, a.Y, w.X, w.Y, e)
		worst = math.Max(worst, e)
	}
	refdata.Report(t, "graffiti 1→3: %d ratio-test matches, %d RANSAC inliers, worst corner error %.2f px", res.Matches, res.Inliers, worst)
	assert.LessOrEqual(t, worst, 5.0, "corner error against H1to3p, px")
}

// cornerShift returns the largest movement, in live pixels, of the four
// pool corners under the registration.
func cornerShift(t *testing.T, res DriftResult, corners []Point) float64 {
	worst := 0.0
	for _, c := range corners {
		q, ok := res.Map(c)
		require.True(t, ok)
		worst = math.Max(worst, math.Hypot(q.X-c.X, q.Y-c.Y))
	}
	return worst
}

// driftRun renders s, registers every frame at the check period to the
// first frame with the pool masked out, and returns the media times and
// the corner shifts in pixels.
func driftRun(t *testing.T, s synth.Scene, every float64) ([]float64, []float64) {
	t.Helper()
	clip, truth := cachedClip(t, s)
	var corners []Point
	for _, c := range truth.Corners {
		corners = append(corners, Point{c.Pixel[0], c.Pixel[1]})
	}
	cam, err := OpenCamera(SourceConfig{URI: clip}, DetectorConfig{ProcessWidth: 320, Mask: corners})
	require.NoError(t, err)
	defer cam.Close()
	var d *Drift
	defer func() {
		if d != nil {
			d.Close()
		}
	}()
	step := int(math.Round(every * s.FPS))
	var ts, shifts []float64
	for i := 0; ; i++ {
		_, err := cam.Next(nil)
		if err == io.EOF {
			break
		}
		require.NoError(t, err)
		if i == 0 {
			ref, err := matImage(cam.frame)
			require.NoError(t, err)
			d, err = NewDrift(ref, DriftConfig{Water: corners})
			require.NoError(t, err)
			continue
		}
		if i%step != 0 {
			continue
		}
		res, err := cam.CheckDrift(d)
		require.NoError(t, err, "frame %d", i)
		ts = append(ts, float64(i)/s.FPS)
		shifts = append(shifts, cornerShift(t, res, corners))
	}
	return ts, shifts
}

// TestDriftPanAndStill checks the camera-moved measurement on synthetic
// clips: a bumped camera (a 3° pan) moves the pool corners by many pixels
// from the pan on, and still scenes with water motion, glints, leaves, a
// deck walker, a cloud and night keep them within a few pixels. The metre
// conversion and threshold are tested in cmd/stillwater.
func TestDriftPanAndStill(t *testing.T) {
	pan := synth.Default()
	pan.PanAt, pan.PanDeg = 8, 3
	windy := synth.Default()
	windy.Ripple, windy.Glints, windy.Leaves, windy.DeckWalker = 1, 8, 12, true
	cloud := synth.Default()
	cloud.Cloud = &synth.Cloud{Start: 4, Ramp: 3, Hold: 4, Depth: 0.6}
	night := synth.Default()
	night.Night = true
	corner := synth.Default()
	corner.Camera = synth.Pose{X: -1.2, Y: -1.0, Height: 2.5, YawDeg: 22, PitchDeg: 24, HFOVDeg: 80}
	corner.Intruders = []synth.Child{{Enter: 5, Path: []synth.Waypoint{{T: 5, X: 3, Y: 2}, {T: 15, X: 6, Y: 2.5}}, AgeMonths: 24}}
	cases := []struct {
		name  string
		s     synth.Scene
		moved bool
	}{
		{"pan 3 degrees at 8 s", pan, true},
		{"windy water, leaves, deck walker", windy, false},
		{"cloud", cloud, false},
		{"night", night, false},
		{"corner camera with a child", corner, false},
	}
	every := 2.0
	if testing.Short() {
		// The pan alone, a 5 s clip panned at 2 s, checked every second.
		cases = cases[:1]
		cases[0].name, cases[0].s.PanAt = "pan 3 degrees at 2 s", 2
		every = 1
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			tc.s.Duration = 16
			if testing.Short() {
				tc.s.Duration = 5
			}
			ts, shifts := driftRun(t, tc.s, every)
			var b strings.Builder
			for i := range ts {
				fmt.Fprintf(&b, " %.0fs:%.1f", ts[i], shifts[i])
			}
			t.Logf("corner shift px by media time:%s", b.String())
			for i, tt := range ts {
				if tc.moved && tt >= tc.s.PanAt {
					assert.Greater(t, shifts[i], 10.0, "at %.1f s, after the pan", tt)
				} else {
					assert.Less(t, shifts[i], 3.0, "at %.1f s", tt)
				}
			}
		})
	}
}

func TestDriftRejectsBadInput(t *testing.T) {
	blank := image.NewRGBA(image.Rect(0, 0, 320, 240))
	_, err := NewDrift(blank, DriftConfig{})
	require.Error(t, err)
	assert.Contains(t, err.Error(), "features outside the water")

	ref := readImage(t, "graf1.png")
	d, err := NewDrift(ref, DriftConfig{})
	require.NoError(t, err)
	defer d.Close()
	_, err = d.Register(image.NewRGBA(image.Rect(0, 0, 100, 100)))
	assert.ErrorContains(t, err, "recalibrate")
	_, err = d.Register(image.NewRGBA(ref.Bounds()))
	assert.ErrorIs(t, err, ErrNoRegistration)
}

// BenchmarkDriftRegister times one camera-moved check on the 800×640
// graffiti pair (feature extraction on the live frame, matching, RANSAC).
func BenchmarkDriftRegister(b *testing.B) {
	p1, err := refdata.Path("graf1.png")
	require.NoError(b, err)
	p3, err := refdata.Path("graf3.png")
	require.NoError(b, err)
	ref, err := GrabFrame(p1, "", 0)
	require.NoError(b, err)
	live, err := GrabFrame(p3, "", 0)
	require.NoError(b, err)
	d, err := NewDrift(ref, DriftConfig{})
	require.NoError(b, err)
	defer d.Close()
	// The daemon hands the camera's Mat over directly (Camera.CheckDrift).
	m, err := imageMat(live)
	require.NoError(b, err)
	defer m.Close()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		if _, err := d.registerMat(m); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(b.Elapsed().Milliseconds())/float64(b.N), "ms/check")
}
