package synth

import (
	"context"
	"fmt"
	"path/filepath"
	"syscall"
	"testing"
	"time"
)

// cpuSeconds is the processor time this process and its waited-for
// children (ffmpeg) have used: on a shared machine it measures the work,
// where wall time also measures the other loads.
func cpuSeconds(b *testing.B) float64 {
	var self, kids syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &self); err != nil {
		b.Fatal(err)
	}
	if err := syscall.Getrusage(syscall.RUSAGE_CHILDREN, &kids); err != nil {
		b.Fatal(err)
	}
	tv := func(t syscall.Timeval) float64 { return float64(t.Sec) + float64(t.Usec)/1e6 }
	return tv(self.Utime) + tv(self.Stime) + tv(kids.Utime) + tv(kids.Stime)
}

// benchScene is one family scene resized to an image size: the lens is
// drawn again for the size with the scene's field of view.
func benchScene(seed int64, v Variant, w, h int) Scene {
	s := FamilyScene(seed, v)
	aspect := s.World.Lens.Fy / s.World.Lens.Fx
	s.Width, s.Height = w, h
	s.World.Lens = drawLens(w, h, s.Camera.HFOVDeg, aspect, 0.5, 0.2, 0, 0, 0, 0, 0)
	return s
}

var benchSizes = [][2]int{{640, 360}, {704, 576}, {960, 540}, {1280, 720}}

// BenchmarkFamilyRender measures the family renderer per image size:
// frames drawn per second (no encoding) on a day scene with a child,
// leaves and an adult on the deck, and the one-off time to build the
// per-pixel tables.
func BenchmarkFamilyRender(b *testing.B) {
	for _, sz := range benchSizes {
		b.Run(fmt.Sprintf("%dx%d", sz[0], sz[1]), func(b *testing.B) {
			s := benchScene(4, Intruder, sz[0], sz[1])
			start := time.Now()
			r := newWRenderer(s)
			build := time.Since(start)
			first := int(20 * s.FPS) // the child is in the water
			b.ReportAllocs()
			b.ResetTimer()
			cpu := cpuSeconds(b)
			for i := 0; i < b.N; i++ {
				if _, err := r.frame(first + i%int(30*s.FPS)); err != nil {
					b.Fatal(err)
				}
			}
			b.StopTimer()
			b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "frames/s")
			b.ReportMetric(float64(b.N)/(cpuSeconds(b)-cpu), "frames/cpu-s")
			b.ReportMetric(build.Seconds(), "build_s")
		})
	}
}

// BenchmarkFamilyEncode measures whole clips, tables and encoding
// included, per codec and size: 10 s of a quiet scene at its own frame
// rate, reported as frames per second of wall time.
func BenchmarkFamilyEncode(b *testing.B) {
	for _, codec := range []string{"mjpeg", "mpeg4", "h264"} {
		for _, sz := range [][2]int{{640, 360}, {1280, 720}} {
			b.Run(fmt.Sprintf("%s %dx%d", codec, sz[0], sz[1]), func(b *testing.B) {
				s := benchScene(9, Quiet, sz[0], sz[1])
				s.Duration = 10
				s.World.Encoding = Encoding{Codec: codec, Quality: map[string]int{"mjpeg": 4, "mpeg4": 5, "h264": 24}[codec], GOP: int(s.FPS)}
				dir := b.TempDir()
				frames := 0
				b.ResetTimer()
				cpu := cpuSeconds(b)
				for i := 0; i < b.N; i++ {
					t, err := Render(context.Background(), s, filepath.Join(dir, fmt.Sprintf("c%d%s", i, VideoExt(s))), "")
					if err != nil {
						b.Fatal(err)
					}
					frames += t.Frames
				}
				b.StopTimer()
				b.ReportMetric(float64(frames)/b.Elapsed().Seconds(), "frames/s")
				b.ReportMetric(float64(frames)/(cpuSeconds(b)-cpu), "frames/cpu-s")
			})
		}
	}
}
