package vision

import (
	"context"
	"image"
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
	b.Run("mog2-640", func(b *testing.B) {
		d, err := NewDetector(legacyCostConfig(truth), size)
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
		b.ReportMetric(float64(b.Elapsed().Microseconds())/1000/float64(b.N), "ms/frame")
	})
}
