package vision

import (
	"context"
	"fmt"
	"image"
	"testing"
	"time"

	"gocv.io/x/gocv"

	"stillwater/vision/synth"
)

// stageSizes are the frame sizes the stage benchmarks run at: a camera's
// usual sub stream and its two usual main streams.
var stageSizes = []image.Point{{640, 360}, {1280, 720}, {1920, 1080}}

// stageClip is synth.StageClip, failing tb when it cannot be made.
func stageClip(tb testing.TB, size image.Point) (string, synth.Truth) {
	tb.Helper()
	video, truth, err := synth.StageClip(context.Background(), size)
	if err != nil {
		tb.Fatal(err)
	}
	return video, truth
}

// BenchmarkVisionStages times, per frame and at each of stageSizes, the
// vision side of the daemon's work, one sub-benchmark per size:
//
//   - decode: OpenCV's FFmpeg backend reading the H.264 clip;
//   - picture checks: the health probe (black, frozen, noise);
//   - rectify, model, candidates: the mean–variance detector's stages
//     (StageClock) on the pool grid, 2.5 cm cells, the grid made from the
//     labelled corners without the scene's lens (a cost figure: the cells
//     land on the pool, a little off where the lens bends most);
//   - pre-roll: the JPEG encoding of each frame into the evidence ring,
//     which a camera with an evidence stream does not do, and the same
//     frames through OpenCV's imencode for comparison.
//
// Each figure is wall time per frame on one goroutine.
//
//	go test -run '^$' -bench VisionStages -benchtime 1x ./vision/
func BenchmarkVisionStages(b *testing.B) {
	for _, size := range stageSizes {
		b.Run(fmt.Sprintf("%dx%d", size.X, size.Y), func(b *testing.B) {
			clip, truth := stageClip(b, size)
			var decode time.Duration
			var frames []gocv.Mat
			defer func() {
				for i := range frames {
					frames[i].Close()
				}
			}()
			for i := 0; i < b.N; i++ {
				for j := range frames {
					frames[j].Close()
				}
				frames = frames[:0]
				cp, err := openCapture(clip, capFFmpeg, 0, 0)
				if err != nil {
					b.Fatal(err)
				}
				for {
					m := gocv.NewMat()
					t0 := time.Now()
					ok, err := cp.read(&m)
					decode += time.Since(t0)
					if err != nil || !ok || m.Empty() {
						m.Close()
						break
					}
					frames = append(frames, m)
				}
				cp.Close()
			}
			if len(frames) < 60 {
				b.Fatalf("%s gave %d frames", clip, len(frames))
			}
			perFrame := func(d time.Duration, n int) float64 { return float64(d.Microseconds()) / 1000 / float64(n) }
			decodeMs := perFrame(decode, b.N*len(frames))

			var probe healthProbe
			defer probe.Close()
			t0 := time.Now()
			for i, f := range frames {
				probe.measure(f, time.Duration(i)*time.Second/15)
			}
			probeMs := perFrame(time.Since(t0), len(frames))

			d, err := newMeanVar(rectifiedCostConfig(b, truth), size)
			if err != nil {
				b.Fatal(err)
			}
			defer d.Close()
			// The model learns on the first two thirds, then the last
			// third (the child in the water) is timed.
			split := 2 * len(frames) / 3
			for _, f := range frames[:split] {
				if _, _, err := d.Detect(f, nil); err != nil {
					b.Fatal(err)
				}
			}
			clock := &StageClock{}
			d.clock = clock
			for _, f := range frames[split:] {
				if _, _, err := d.Detect(f, nil); err != nil {
					b.Fatal(err)
				}
			}
			if clock.Frames == 0 {
				b.Fatal("no timed frame reached the candidates stage")
			}

			t0 = time.Now()
			for _, f := range frames[split:] {
				if _, err := encodeJPEG(f, 80); err != nil {
					b.Fatal(err)
				}
			}
			jpegMs := perFrame(time.Since(t0), len(frames)-split)
			// The same frames through OpenCV's imencode, which writes the
			// same bytes (TestEncodeJPEGMatchesOpenCV) after copying each
			// row into RGB order.
			t0 = time.Now()
			for _, f := range frames[split:] {
				buf, err := gocv.IMEncodeWithParams(gocv.JPEGFileExt, f, []int{gocv.IMWriteJpegQuality, 80})
				if err != nil {
					b.Fatal(err)
				}
				_ = append([]byte(nil), buf.GetBytes()...)
				buf.Close()
			}
			cvJpegMs := perFrame(time.Since(t0), len(frames)-split)

			b.ReportMetric(decodeMs, "decode_ms/frame")
			b.ReportMetric(probeMs, "checks_ms/frame")
			line := fmt.Sprintf("vision stages at %dx%d (ms/frame): decode %.2f, picture checks %.2f", size.X, size.Y, decodeMs, probeMs)
			var detect float64
			for _, s := range Stages() {
				ms := perFrame(clock.Total(s), clock.Frames)
				detect += ms
				b.ReportMetric(ms, s.String()+"_ms/frame")
				line += fmt.Sprintf(", %s %.2f", s, ms)
			}
			b.ReportMetric(jpegMs, "preroll_ms/frame")
			b.ReportMetric(cvJpegMs, "preroll_imencode_ms/frame")
			line += fmt.Sprintf(" (detector %.2f), pre-roll JPEG %.2f (through OpenCV's imencode %.2f)", detect, jpegMs, cvJpegMs)
			// Printed, not logged: the benchmark log keeps only ten lines.
			fmt.Println(line)
		})
	}
}
