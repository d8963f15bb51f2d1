package vision

import (
	"fmt"
	"image"
	"math"
	"os/exec"
	"path/filepath"
	"slices"
	"testing"
	"time"

	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"

	"stillwater/vision/decode"
	"stillwater/vision/refdata"
)

// planeClip re-encodes the first frames of OpenCV's sample vtest.avi
// (Debian's opencv-doc: people walking, 768 × 576) with ffmpeg and codec.
func planeClip(tb testing.TB, name string, codec ...string) string {
	tb.Helper()
	src, err := refdata.Path("vtest.avi")
	require.NoError(tb, err)
	_, err = exec.LookPath("ffmpeg")
	require.NoError(tb, err, "ffmpeg (deploy/setup installs it)")
	out := filepath.Join(tb.TempDir(), name)
	args := append([]string{"-nostdin", "-loglevel", "error", "-y", "-i", src, "-frames:v", "40"}, codec...)
	b, err := exec.Command("ffmpeg", append(args, out)...).CombinedOutput()
	require.NoError(tb, err, "ffmpeg: %s", b)
	return out
}

// warpMaps are maps of a grid of w × h cells onto a quadrilateral that
// overhangs the frame's left and bottom edges, as a pool grid's deck
// margin can: a perspective warp.
func warpMaps(tb testing.TB, src image.Point, w, h int) (gocv.Mat, gocv.Mat) {
	tb.Helper()
	from := gocv.NewPointVectorFromPoints([]image.Point{{0, 0}, {w, 0}, {w, h}, {0, h}})
	defer from.Close()
	to := gocv.NewPointVectorFromPoints([]image.Point{{-20, 40}, {src.X - 60, 10}, {src.X - 90, src.Y + 15}, {30, src.Y - 50}})
	defer to.Close()
	hm := gocv.GetPerspectiveTransform(from, to)
	defer hm.Close()
	mx := gocv.NewMatWithSize(h, w, gocv.MatTypeCV32F)
	my := gocv.NewMatWithSize(h, w, gocv.MatTypeCV32F)
	for r := 0; r < h; r++ {
		for c := 0; c < w; c++ {
			x, y := float64(c)+0.5, float64(r)+0.5
			d := hm.GetDoubleAt(2, 0)*x + hm.GetDoubleAt(2, 1)*y + hm.GetDoubleAt(2, 2)
			mx.SetFloatAt(r, c, float32((hm.GetDoubleAt(0, 0)*x+hm.GetDoubleAt(0, 1)*y+hm.GetDoubleAt(0, 2))/d))
			my.SetFloatAt(r, c, float32((hm.GetDoubleAt(1, 0)*x+hm.GetDoubleAt(1, 1)*y+hm.GetDoubleAt(1, 2))/d))
		}
	}
	return mx, my
}

// diffStats returns the mean, the 99.9th percentile and the largest of the
// absolute differences between two 8-bit images of one size and type.
func diffStats(tb testing.TB, a, b gocv.Mat) (mean, p999, most float64) {
	tb.Helper()
	require.Equal(tb, a.Rows(), b.Rows())
	require.Equal(tb, a.Cols(), b.Cols())
	require.Equal(tb, a.Type(), b.Type())
	x, err := a.DataPtrUint8()
	require.NoError(tb, err)
	y, err := b.DataPtrUint8()
	require.NoError(tb, err)
	d := make([]int, len(x))
	sum := 0
	for i := range x {
		d[i] = int(x[i]) - int(y[i])
		if d[i] < 0 {
			d[i] = -d[i]
		}
		sum += d[i]
	}
	slices.Sort(d)
	return float64(sum) / float64(len(d)), float64(d[int(math.Ceil(0.999*float64(len(d))))-1]), float64(d[len(d)-1])
}

// TestPlanesMatchBGR holds the work on a frame's own planes to the BGR
// path it replaces, on real footage (vtest.avi re-encoded as an IP
// camera's H.264 would be, 4:2:0 limited range; as an MJPEG camera's,
// 4:2:2 full range; and as 4:4:4): each frame is converted in full by
// swscale (as OpenCV's capture converts it) and then remapped by OpenCV,
// and, the other way, remapped plane by plane and converted at the grid's
// cells only. Unscaled, at the frame's own pixels, 4:4:4 (no chroma to
// interpolate) must give swscale's bytes within 1. Otherwise the two may
// differ by rounding, where the chroma is interpolated instead of
// repeated, where a colour clipped at 0 or 255 is interpolated before or
// after clipping, and by swscale's fast 4:2:0 converter, which reads
// about 1.5 grey levels darker than BT.601 (measured here, against its
// own 4:4:4 path, which keeps to the standard within 1); the bounds below
// hold with a margin over what was measured (printed). The grey probe of
// the picture checks is held to OpenCV's: the BGR frame averaged down,
// then BT.601's grey.
func TestPlanesMatchBGR(t *testing.T) {
	cases := []struct {
		name  string
		codec []string
		full  bool
		shift [2]int
		exact bool // unscaled, within 1 of swscale everywhere
	}{
		{"h264 4:2:0", []string{"-c:v", "libx264", "-g", "20", "-bf", "0", "-pix_fmt", "yuv420p"}, false, [2]int{1, 1}, false},
		{"mjpeg 4:2:2 full range", []string{"-c:v", "mjpeg", "-q:v", "3", "-pix_fmt", "yuvj422p"}, true, [2]int{1, 0}, false},
		{"h264 4:4:4", []string{"-c:v", "libx264", "-g", "20", "-bf", "0", "-pix_fmt", "yuv444p"}, false, [2]int{0, 0}, true},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			ext := ".mp4"
			if tc.full {
				ext = ".avi"
			}
			s, err := decode.Open(planeClip(t, "clip"+ext, tc.codec...), decode.Options{})
			require.NoError(t, err)
			defer s.Close()
			src := s.Info().Size
			mapX, mapY := warpMaps(t, src, 320, 200)
			defer mapX.Close()
			defer mapY.Close()
			d := &meanVar{src: src, mapX: mapX, mapY: mapY}
			for _, m := range []*gocv.Mat{&d.fmapX, &d.fmapY, &d.cmapX, &d.cmapY, &d.py, &d.pcb, &d.pcr, &d.frame} {
				*m = gocv.NewMat()
				defer m.Close()
			}
			bgr, want, small, grey, got := gocv.NewMat(), gocv.NewMat(), gocv.NewMat(), gocv.NewMat(), gocv.NewMat()
			for _, m := range []*gocv.Mat{&bgr, &want, &small, &grey, &got} {
				defer m.Close()
			}
			ix, iy := gocv.NewMatWithSize(src.Y, src.X, gocv.MatTypeCV32F), gocv.NewMatWithSize(src.Y, src.X, gocv.MatTypeCV32F)
			defer ix.Close()
			defer iy.Close()
			for r := 0; r < src.Y; r++ {
				for c := 0; c < src.X; c++ {
					ix.SetFloatAt(r, c, float32(c))
					iy.SetFloatAt(r, c, float32(r))
				}
			}
			unscaled := &meanVar{src: src, mapX: ix, mapY: iy}
			for _, m := range []*gocv.Mat{&unscaled.fmapX, &unscaled.fmapY, &unscaled.cmapX, &unscaled.cmapY, &unscaled.py, &unscaled.pcb, &unscaled.pcr, &unscaled.frame} {
				*m = gocv.NewMat()
				defer m.Close()
			}
			var unscaledMost float64
			probe := image.Pt(src.X/4, src.Y/4) // 192 × 144: a whole factor, as at 640 to 1920 wide
			var worstMean, worstP999, worstMost, greyMean, greyP999, greyMost float64
			frames := 0
			for {
				if _, err := s.Next(); err != nil {
					break
				}
				p, ok := s.Planes()
				require.True(t, ok, "frame %d: no planes", frames)
				require.Equal(t, tc.full, p.FullRange)
				require.Equal(t, tc.shift, [2]int{p.ShiftX, p.ShiftY})
				require.NoError(t, s.BGR(&bgr, src))
				gocv.Remap(bgr, &want, &mapX, &mapY, gocv.InterpolationLinear, gocv.BorderReplicate, black)
				require.NoError(t, d.rectifyPlanes(p))
				mean, p999, most := diffStats(t, want, d.frame)
				worstMean, worstP999, worstMost = max(worstMean, mean), max(worstP999, p999), max(worstMost, most)

				require.NoError(t, unscaled.rectifyPlanes(p))
				_, _, most = diffStats(t, bgr, unscaled.frame)
				unscaledMost = max(unscaledMost, most)

				require.NoError(t, areaShrink(bgr, 4, &small))
				gocv.CvtColor(small, &grey, gocv.ColorBGRToGray)
				require.NoError(t, planeGrey(p, probe, &got))
				mean, p999, most = diffStats(t, grey, got)
				greyMean, greyP999, greyMost = max(greyMean, mean), max(greyP999, p999), max(greyMost, most)
				frames++
			}
			require.Equal(t, 40, frames)
			t.Logf("%s, %d frames, worst frame: unscaled BGR differs by at most %.0f; grid BGR differs by mean %.3f, 99.9th percentile %.0f, most %.0f grey levels; probe grey by mean %.3f, 99.9th percentile %.0f, most %.0f",
				tc.name, frames, unscaledMost, worstMean, worstP999, worstMost, greyMean, greyP999, greyMost)
			if tc.exact {
				require.LessOrEqual(t, unscaledMost, 1.0)
			}
			require.Less(t, worstMean, 2.0)
			require.LessOrEqual(t, worstP999, 20.0)
			require.Less(t, greyMean, 2.0)
			require.LessOrEqual(t, greyP999, 20.0)
		})
	}
}

// TestPlanesNeedTheirFormat checks that a frame that is not 8-bit planar
// YUV is not shown as planes (the camera then converts it in full): a
// raw grey video is one plane.
func TestPlanesNeedTheirFormat(t *testing.T) {
	s, err := decode.Open(planeClip(t, "grey.avi", "-c:v", "rawvideo", "-pix_fmt", "gray"), decode.Options{})
	require.NoError(t, err)
	defer s.Close()
	_, err = s.Next()
	require.NoError(t, err)
	_, ok := s.Planes()
	require.False(t, ok, "a grey frame shown as YUV planes")
}

// BenchmarkCameraPlanes times Camera.Next, stage by stage, on the stage
// clip at each of stageSizes (H.264, the pool grid of 2.5 cm cells), with
// the frame left in the decoder's planes and, for comparison, converted
// to BGR in full first as before. Wall time per frame on one goroutine,
// with OpenCV's pool at one thread, the daemon's default (the decoder runs
// on the camera's goroutine, one thread).
//
//	go test -run '^$' -bench CameraPlanes -benchtime 1x ./vision/
func BenchmarkCameraPlanes(b *testing.B) {
	was := Threads()
	require.NoError(b, SetThreads(1))
	defer SetThreads(was)
	for _, size := range stageSizes {
		clip, truth := stageClip(b, size)
		for _, planar := range []bool{true, false} {
			name := fmt.Sprintf("%dx%d/planes", size.X, size.Y)
			if !planar {
				name = fmt.Sprintf("%dx%d/bgr", size.X, size.Y)
			}
			b.Run(name, func(b *testing.B) {
				clock := &StageClock{}
				frames := 0
				var wall time.Duration
				for i := 0; i < b.N; i++ {
					cam, err := OpenCamera(SourceConfig{URI: clip}, rectifiedCostConfig(b, truth))
					require.NoError(b, err)
					cam.bgrOnly = !planar
					cam.SetStageClock(clock)
					t0 := time.Now()
					for {
						if _, err := cam.Next(nil); err != nil {
							break
						}
						frames++
					}
					wall += time.Since(t0)
					cam.Close()
				}
				per := func(d time.Duration) float64 { return float64(d.Microseconds()) / 1000 / float64(frames) }
				line := fmt.Sprintf("camera at %s (ms/frame): all %.2f", name, per(wall))
				b.ReportMetric(per(wall), "ms/frame")
				for _, s := range append([]Stage{StageDecode, StageChecks}, Stages()...) {
					b.ReportMetric(per(clock.Total(s)), s.String()+"_ms/frame")
					line += fmt.Sprintf(", %s %.2f", s, per(clock.Total(s)))
				}
				fmt.Println(line)
			})
		}
	}
}

// TestCameraPlanesKeepTheFrame checks the frame a camera searching the
// decoder's planes hands out whole: whenever asked (here every fifth
// frame), the BGR frame must be the frame just searched, byte for byte
// what the decoder converts for a second reader of the same clip; and
// once the capture is closed (a reconnect, a loop) the last frame must
// still be there, converted before the decoder went.
func TestCameraPlanesKeepTheFrame(t *testing.T) {
	clip, truth := stageClip(t, image.Pt(640, 360))
	cam, err := OpenCamera(SourceConfig{URI: clip}, rectifiedCostConfig(t, truth))
	require.NoError(t, err)
	defer cam.Close()
	// The second reader decodes as the camera does, without the
	// deblocking filter (SourceConfig.Deblock false).
	ref, err := decode.Open(clip, decode.Options{SkipDeblock: true})
	require.NoError(t, err)
	defer ref.Close()
	want := gocv.NewMat()
	defer want.Close()
	planar := 0
	for i := 0; i < 60; i++ {
		_, err := cam.Next(nil)
		require.NoError(t, err)
		_, err = ref.Next()
		require.NoError(t, err)
		if cam.planar {
			planar++
		}
		if i%5 != 4 {
			continue
		}
		require.NoError(t, ref.BGR(&want, image.Point{}))
		got, err := cam.bgr()
		require.NoError(t, err)
		_, _, most := diffStats(t, want, got)
		require.Zero(t, most, "frame %d: the whole frame handed out is not the frame searched", i)
	}
	// The first frame comes converted from the open; every other one
	// stays in the planes.
	require.Equal(t, 59, planar)
	_, err = cam.Next(nil)
	require.NoError(t, err)
	_, err = ref.Next()
	require.NoError(t, err)
	require.NoError(t, ref.BGR(&want, image.Point{}))
	cam.closeCapture()
	got, err := cam.bgr()
	require.NoError(t, err)
	_, _, most := diffStats(t, want, got)
	require.Zero(t, most, "the last frame did not outlive its decoder")
}

// TestCameraPlanesRejoin reconnects a mean–variance camera that searches
// the decoder's planes to the same picture (the clip opened again, its
// first frames the same water): the probing after the reconnect must
// compare the planes with what the model learned from them and keep the
// background, as it does for frames converted in full.
func TestCameraPlanesRejoin(t *testing.T) {
	clip, truth := stageClip(t, image.Pt(640, 360))
	for _, bgrOnly := range []bool{true, false} {
		cam, err := OpenCamera(SourceConfig{URI: clip}, rectifiedCostConfig(t, truth))
		require.NoError(t, err)
		cam.bgrOnly = bgrOnly
		for i := 0; i < 80; i++ { // the empty pool, before the child comes at about 6 s
			_, err := cam.Next(nil)
			require.NoError(t, err)
		}
		_, err = cam.Reconnect()
		require.NoError(t, err)
		var out string
		probedPlanes := 0
		for i := 0; i < 130 && out == ""; i++ {
			r, err := cam.Next(nil)
			require.NoError(t, err)
			if r.Rejoining && cam.planar {
				probedPlanes++
			}
			out = r.Rejoined
		}
		cam.Close()
		require.Equal(t, RejoinKept, out, "planes %v: the same picture after a reconnect", !bgrOnly)
		if bgrOnly {
			require.Zero(t, probedPlanes)
		} else {
			require.Positive(t, probedPlanes, "no frame was probed in its planes")
		}
	}
}
