package vision

import (
	"context"
	"fmt"
	"image"
	"math"
	"path/filepath"
	"testing"

	"gocv.io/x/gocv"

	"stillwater/vision/synth"
)

// costFrames renders the fixed clip the detector's cost is measured on: the
// "child" scene (seed 7) at 1280×720, a common camera stream and the size of
// the independent development clips, and returns n of its frames from 8 s,
// when the child is in the water, with the scene's labels. The caller
// closes the frames.
func costFrames(tb testing.TB, n int) ([]gocv.Mat, synth.Truth) {
	tb.Helper()
	s := synth.Scenarios(7)["child"]
	s.Width, s.Height = 1280, 720
	s.Duration = 8 + float64(n)/s.FPS
	clip := filepath.Join(tb.TempDir(), "cost.avi")
	truth, err := synth.Render(context.Background(), s, clip, "")
	if err != nil {
		tb.Fatal(err)
	}
	vc, err := gocv.VideoCaptureFile(clip)
	if err != nil {
		tb.Fatal(err)
	}
	defer vc.Close()
	skip := int(8 * s.FPS)
	var frames []gocv.Mat
	for i := 0; ; i++ {
		m := gocv.NewMat()
		if ok := vc.Read(&m); !ok || m.Empty() {
			m.Close()
			break
		}
		if i < skip {
			m.Close()
			continue
		}
		frames = append(frames, m)
	}
	if len(frames) == 0 {
		tb.Fatal("cost clip gave no frames")
	}
	return frames, truth
}

// legacyCostConfig is the earlier detector as the daemon set it up for a
// calibrated camera: MOG2 at 640 px wide over the pool outline.
func legacyCostConfig(truth synth.Truth) DetectorConfig {
	var mask []Point
	for _, c := range truth.Corners {
		mask = append(mask, Point{c.Pixel[0], c.Pixel[1]})
	}
	return DetectorConfig{ProcessWidth: 640, Method: "mog2", History: 500, Threshold: 16, LearningRate: -1, MinPixels: 6, Mask: mask}
}

// rectifiedCostConfig is the mean–variance detector as the daemon sets it
// up for the same camera: 2.5 cm cells over the pool and 0.6 m of deck,
// the grid made here from the labelled corners with OpenCV's
// getPerspectiveTransform (the scene has no lens distortion).
func rectifiedCostConfig(tb testing.TB, truth synth.Truth) DetectorConfig {
	const cell, deck = 0.025, 0.6
	L, W := truth.Pool.Length, truth.Pool.Width
	var src, dst []gocv.Point2f
	for _, c := range truth.Corners {
		src = append(src, gocv.Point2f{X: float32(c.Pool[0]), Y: float32(c.Pool[1])})
		dst = append(dst, gocv.Point2f{X: float32(c.Pixel[0]), Y: float32(c.Pixel[1])})
	}
	sv, dv := gocv.NewPoint2fVectorFromPoints(src), gocv.NewPoint2fVectorFromPoints(dst)
	defer sv.Close()
	defer dv.Close()
	h := gocv.GetPerspectiveTransform2f(sv, dv)
	defer h.Close()
	cols, rows := int(math.Ceil((L+2*deck)/cell)), int(math.Ceil((W+2*deck)/cell))
	r := &Rectification{Cols: cols, Rows: rows, Cell: cell, OriginX: -deck, OriginY: -deck, Src: image.Pt(truth.Width, truth.Height)}
	for j := 0; j < rows; j++ {
		for i := 0; i < cols; i++ {
			x, y := -deck+(float64(i)+0.5)*cell, -deck+(float64(j)+0.5)*cell
			w := h.GetDoubleAt(2, 0)*x + h.GetDoubleAt(2, 1)*y + h.GetDoubleAt(2, 2)
			u := (h.GetDoubleAt(0, 0)*x + h.GetDoubleAt(0, 1)*y + h.GetDoubleAt(0, 2)) / w
			v := (h.GetDoubleAt(1, 0)*x + h.GetDoubleAt(1, 1)*y + h.GetDoubleAt(1, 2)) / w
			if w <= 0 || u < 0 || v < 0 || u > float64(truth.Width-1) || v > float64(truth.Height-1) {
				u, v = -1, -1
			}
			r.MapX, r.MapY = append(r.MapX, float32(u)), append(r.MapY, float32(v))
			k := byte(CellDeck)
			if x >= 0 && y >= 0 && x <= L && y <= W {
				k = CellWater
			}
			r.Water = append(r.Water, k)
		}
	}
	return DetectorConfig{Method: "meanvar", Grid: r, MeanVar: MeanVarConfig{FPS: truth.FPS}}
}

// BenchmarkDetectCost measures the vision stage's cost per frame, decoding
// excluded: frames are decoded once into memory, the detector warms up on
// them, then every timed iteration detects one frame.
//
//	go test -tags matprofile -run '^$' -bench DetectCost ./vision/
func BenchmarkDetectCost(b *testing.B) {
	frames, truth := costFrames(b, 40)
	defer func() {
		for i := range frames {
			frames[i].Close()
		}
	}()
	size := image.Pt(frames[0].Cols(), frames[0].Rows())
	perFrame := map[string]float64{}
	for _, c := range []struct {
		name string
		cfg  DetectorConfig
	}{
		{"mog2-640", legacyCostConfig(truth)},
		{"meanvar", rectifiedCostConfig(b, truth)},
	} {
		b.Run(c.name, func(b *testing.B) {
			d, err := newFrameDetector(c.cfg, size)
			if err != nil {
				b.Fatal(err)
			}
			defer d.Close()
			for i := 0; i < 2*len(frames); i++ {
				if _, _, err := d.Detect(frames[i%len(frames)], nil); err != nil {
					b.Fatal(err)
				}
			}
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				if _, _, err := d.Detect(frames[i%len(frames)], nil); err != nil {
					b.Fatal(err)
				}
			}
			ms := float64(b.Elapsed().Microseconds()) / 1000 / float64(b.N)
			perFrame[c.name] = ms
			b.ReportMetric(ms, "ms/frame")
		})
	}
	if old, now := perFrame["mog2-640"], perFrame["meanvar"]; old > 0 && now > 0 {
		// Printed, not logged: the benchmark log keeps only ten lines.
		fmt.Printf("vision stage on the 1280×720 clip: mog2 at 640 px %.2f ms a frame, meanvar %.2f ms a frame, ratio %.2f (target ≤ 1.5)\n", old, now, now/old)
		b.ReportMetric(now/old, "cost_ratio")
		if now/old > 1.5 {
			b.Errorf("the mean-variance detector costs %.2f× the mixture model's", now/old)
		}
	}
}
