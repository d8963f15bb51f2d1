package decode

import (
	"errors"
	"image"
	"io"
	"net"
	"net/http"
	"net/http/httptest"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"

	"stillwater/vision/refdata"
)

// reference returns the path of an opencv-doc example file. deploy/setup
// fetches them; a missing one fails the test, as elsewhere in the project.
func reference(tb testing.TB, name string) string {
	tb.Helper()
	p, err := refdata.Path(name)
	require.NoError(tb, err)
	return p
}

// h264Of re-encodes the first frames of src with ffmpeg's libx264 (key
// frame every 20, no B-frames, as IP cameras send) at size, for a test.
func h264Of(tb testing.TB, src string, frames int, size string) string {
	return encoded(tb, src, frames, size, "clip.mp4", "-c:v", "libx264", "-g", "20", "-bf", "0", "-pix_fmt", "yuv420p")
}

// encoded re-encodes the first frames of src at size (empty: as it is)
// with ffmpeg and the given codec arguments into name in a temporary
// directory.
func encoded(tb testing.TB, src string, frames int, size, name string, codec ...string) string {
	tb.Helper()
	_, err := exec.LookPath("ffmpeg")
	require.NoError(tb, err, "ffmpeg (deploy/setup installs it)")
	out := filepath.Join(tb.TempDir(), name)
	args := []string{"-nostdin", "-loglevel", "error", "-y", "-i", src, "-frames:v", strconv.Itoa(frames)}
	if size != "" {
		args = append(args, "-vf", "scale="+size)
	}
	args = append(append(args, codec...), out)
	b, err := exec.Command("ffmpeg", args...).CombinedOutput()
	require.NoError(tb, err, "ffmpeg: %s", b)
	return out
}

// absDiff returns the mean and the largest absolute difference between
// two images of one size and type.
func absDiff(tb testing.TB, a, b gocv.Mat) (mean float64, most float64) {
	tb.Helper()
	require.Equal(tb, a.Cols(), b.Cols())
	require.Equal(tb, a.Rows(), b.Rows())
	require.Equal(tb, a.Type(), b.Type())
	d := gocv.NewMat()
	defer d.Close()
	gocv.AbsDiff(a, b, &d)
	flat := d.Reshape(1, 0)
	defer flat.Close()
	_, hi, _, _ := gocv.MinMaxLoc(flat)
	return flat.Mean().Val1, float64(hi)
}

// TestFramesMatchOpenCV decodes clips with OpenCV's FFmpeg capture (the
// reference) and with a Stream, frame by frame. Real footage from
// Debian's opencv-doc: vtest.avi (MS-MPEG4, people walking), tree.avi
// (Cinepak, a tree in wind), Megamind.avi (MPEG-4), and vtest.avi's first
// 60 frames re-encoded by ffmpeg to H.264, the codec of most IP cameras,
// and to MJPEG.
// Both go through the same FFmpeg decoder and swscale converter, so full
// frames must be identical, and so must their times.
func TestFramesMatchOpenCV(t *testing.T) {
	cases := []struct {
		name  string
		path  func(testing.TB) string
		codec string
	}{
		{"vtest.avi", func(tb testing.TB) string { return reference(tb, "vtest.avi") }, "msmpeg4"},
		{"tree.avi", func(tb testing.TB) string { return reference(tb, "tree.avi") }, "cinepak"},
		{"Megamind.avi", func(tb testing.TB) string { return reference(tb, "Megamind.avi") }, "mpeg4"},
		{"vtest h264", func(tb testing.TB) string { return h264Of(tb, reference(tb, "vtest.avi"), 60, "") }, "h264"},
		// Full-range 4:2:2, what MJPEG cameras send.
		{"vtest mjpeg", func(tb testing.TB) string {
			return encoded(tb, reference(tb, "vtest.avi"), 60, "", "clip.avi", "-c:v", "mjpeg", "-q:v", "4", "-pix_fmt", "yuvj422p")
		}, "mjpeg"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			path := c.path(t)
			ref, err := gocv.VideoCaptureFile(path)
			require.NoError(t, err)
			defer ref.Close()
			s, err := Open(path, Options{})
			require.NoError(t, err)
			defer s.Close()
			info := s.Info()
			assert.Contains(t, info.Codec, c.codec)
			assert.Equal(t, image.Pt(int(ref.Get(gocv.VideoCaptureFrameWidth)), int(ref.Get(gocv.VideoCaptureFrameHeight))), info.Size)
			assert.InDelta(t, ref.Get(gocv.VideoCaptureFPS), info.FPS, 0.01)

			want, got := gocv.NewMat(), gocv.NewMat()
			defer want.Close()
			defer got.Close()
			frames, untimed := 0, 0
			if info.Frames > 0 {
				assert.Equal(t, int64(ref.Get(gocv.VideoCaptureFrameCount)), info.Frames, "declared frame count")
			}
			for ref.Read(&want) && !want.Empty() {
				f, err := s.Next()
				require.NoError(t, err, "frame %d", frames)
				if f.HasPTS {
					require.InDelta(t, ref.Get(gocv.VideoCapturePosMsec), 1000*f.PTS.Seconds(), 0.01, "frame %d's time, ms", frames)
				} else {
					// OpenCV says 0 for a frame without a time.
					require.Zero(t, ref.Get(gocv.VideoCapturePosMsec), "frame %d has no time", frames)
					untimed++
				}
				require.NoError(t, s.BGR(&got, image.Point{}))
				mean, most := absDiff(t, want, got)
				require.Zero(t, most, "frame %d differs from OpenCV's (mean %.3f)", frames, mean)
				frames++
			}
			_, err = s.Next()
			assert.ErrorIs(t, err, io.EOF, "after OpenCV's last frame (%d)", frames)
			assert.Greater(t, frames, 50)
			refdata.Report(t, "%s: %d frames identical to OpenCV's (%d without a time), %v, %.2f fps", c.name, frames, untimed, info.Size, info.FPS)
		})
	}
}

// TestScaledMatchesOpenCVArea: a frame converted straight to a smaller
// size is close to OpenCV's full frame shrunk by area averaging (INTER_AREA,
// the reference), on vtest.avi at half and at a third of its size.
func TestScaledMatchesOpenCVArea(t *testing.T) {
	path := reference(t, "vtest.avi")
	for _, size := range []image.Point{{384, 288}, {256, 192}} {
		ref, err := gocv.VideoCaptureFile(path)
		require.NoError(t, err)
		s, err := Open(path, Options{})
		require.NoError(t, err)
		full, want, got := gocv.NewMat(), gocv.NewMat(), gocv.NewMat()
		worst := 0.0
		for i := 0; i < 40 && ref.Read(&full); i++ {
			_, err := s.Next()
			require.NoError(t, err)
			require.NoError(t, s.BGR(&got, size))
			gocv.Resize(full, &want, size, 0, 0, gocv.InterpolationArea)
			mean, _ := absDiff(t, want, got)
			worst = max(worst, mean)
		}
		full.Close()
		want.Close()
		got.Close()
		s.Close()
		ref.Close()
		// swscale's area filter and OpenCV's INTER_AREA weigh the same
		// blocks; they differ in the chroma upsampling before it and in
		// rounding, not in what they show.
		assert.Less(t, worst, 2.0, "at %v", size)
		refdata.Report(t, "at %v: worst frame mean difference from OpenCV's INTER_AREA %.2f levels", size, worst)
	}
}

// TestDamagedFile: opencv-doc's Megamind_bugy.avi has damaged frames. The
// stream reads it to its end, counting what it skips, and gives at least
// as many frames as OpenCV's capture does.
func TestDamagedFile(t *testing.T) {
	path := reference(t, "Megamind_bugy.avi")
	ref, err := gocv.VideoCaptureFile(path)
	require.NoError(t, err)
	defer ref.Close()
	m := gocv.NewMat()
	defer m.Close()
	want := 0
	for ref.Read(&m) && !m.Empty() {
		want++
	}
	s, err := Open(path, Options{})
	require.NoError(t, err)
	defer s.Close()
	got := 0
	for {
		_, err := s.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		require.NoError(t, err)
		require.NoError(t, s.BGR(&m, image.Point{}))
		got++
	}
	assert.GreaterOrEqual(t, got, want)
	refdata.Report(t, "Megamind_bugy.avi: %d frames (OpenCV's capture %d), %d damaged packets or frames skipped", got, want, s.Errors())
}

func TestOpenErrors(t *testing.T) {
	dir := t.TempDir()
	text := filepath.Join(dir, "notes.mp4")
	require.NoError(t, os.WriteFile(text, []byte("not a video\n"), 0o644))
	cases := []struct {
		name string
		url  string
		opts Options
		want []string
	}{
		{"missing file", filepath.Join(dir, "none.mp4"), Options{}, []string{"none.mp4", "open", "No such file"}},
		{"not a video", text, Options{}, []string{"notes.mp4", "open"}},
		{"bad option key", text, Options{Demuxer: map[string]string{"a=b": "c"}}, []string{"notes.mp4", `"a=b"`}},
		{"bad option value", text, Options{Demuxer: map[string]string{"a": "b\nc"}}, []string{"notes.mp4", "newlines"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			s, err := Open(c.url, c.opts)
			require.Error(t, err)
			assert.Nil(t, s)
			for _, w := range c.want {
				assert.Contains(t, err.Error(), w)
			}
		})
	}
}

// TestOpenTimeout: an RTSP server that accepts the connection and never
// answers must not hold Open past its timeout (FFmpeg's own default wait
// is far longer). The server is a listener on 127.0.0.1. The error names
// the stream as told, without the password in its address.
func TestOpenTimeout(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	defer ln.Close()
	go func() {
		for {
			c, err := ln.Accept()
			if err != nil {
				return
			}
			defer c.Close() // held open, silent, until the listener closes
		}
	}()
	start := time.Now()
	s, err := Open("rtsp://viewer:secret@"+ln.Addr().String()+"/cam", Options{Demuxer: map[string]string{"rtsp_transport": "tcp"},
		OpenTimeout: 300 * time.Millisecond, Name: "rtsp://viewer:xxxxx@" + ln.Addr().String() + "/cam"})
	took := time.Since(start)
	require.Error(t, err)
	assert.Nil(t, s)
	assert.Contains(t, err.Error(), "timed out")
	assert.Contains(t, err.Error(), "viewer:xxxxx@", "errors call the stream by Options.Name")
	assert.NotContains(t, err.Error(), "secret")
	assert.Less(t, took, 2*time.Second)
	refdata.Report(t, "silent server: %v after %v", err, took.Round(time.Millisecond))
}

// TestReadTimeout: a stream that stops sending in the middle (an HTTP
// server that sends half of an MPEG-TS clip and then nothing, holding the
// connection) ends a read after the read timeout with an error saying so,
// after giving the frames that did arrive; FFmpeg alone would wait on.
func TestReadTimeout(t *testing.T) {
	src := h264Of(t, reference(t, "vtest.avi"), 60, "")
	ts := filepath.Join(t.TempDir(), "clip.ts")
	out, err := exec.Command("ffmpeg", "-nostdin", "-loglevel", "error", "-y", "-i", src, "-c", "copy", "-f", "mpegts", ts).CombinedOutput()
	require.NoError(t, err, "ffmpeg: %s", out)
	data, err := os.ReadFile(ts)
	require.NoError(t, err)
	done := make(chan struct{})
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "video/mp2t")
		w.Write(data[:len(data)/2/188*188])
		w.(http.Flusher).Flush()
		select { // silent from here on, connection held
		case <-done:
		case <-r.Context().Done():
		}
	}))
	defer srv.Close()
	defer close(done)

	s, err := Open(srv.URL+"/clip.ts", Options{ReadTimeout: 300 * time.Millisecond, OpenTimeout: time.Second})
	require.NoError(t, err)
	defer s.Close()
	frames := 0
	var last time.Time
	for {
		last = time.Now()
		if _, err = s.Next(); err != nil {
			break
		}
		frames++
	}
	took := time.Since(last)
	require.Error(t, err)
	assert.NotErrorIs(t, err, io.EOF)
	assert.Contains(t, err.Error(), "timed out")
	assert.Greater(t, frames, 10, "the frames sent before the stall")
	assert.Less(t, frames, 60)
	assert.Less(t, took, 2*time.Second)
	refdata.Report(t, "stalled after %d of 60 frames: %v after %v", frames, err, took.Round(time.Millisecond))
}

// TestTimesAndKeyFrames: on an H.264 clip of known rate and key frame
// interval (ffmpeg: 10 fps from vtest.avi, -g 20), presentation times step
// by one frame interval and key frames come every 20 frames.
func TestTimesAndKeyFrames(t *testing.T) {
	s, err := Open(h264Of(t, reference(t, "vtest.avi"), 60, ""), Options{})
	require.NoError(t, err)
	defer s.Close()
	for i := 0; i < 60; i++ {
		f, err := s.Next()
		require.NoError(t, err)
		require.True(t, f.HasPTS)
		assert.InDelta(t, float64(i)*0.1, f.PTS.Seconds(), 1e-6, "frame %d", i)
		assert.Equal(t, i%20 == 0, f.Key, "frame %d", i)
	}
	_, err = s.Next()
	assert.ErrorIs(t, err, io.EOF)
	assert.Zero(t, s.Errors())
	require.NoError(t, s.Close())
	require.NoError(t, s.Close(), "a second Close")
	_, err = s.Next()
	assert.Error(t, err, "Next after Close")
}

// cpuSeconds is the process's CPU time, every thread's (OpenCV decodes on
// a pool of its own).
func cpuSeconds(tb testing.TB) float64 {
	var u syscall.Rusage
	require.NoError(tb, syscall.Getrusage(syscall.RUSAGE_SELF, &u))
	tv := func(t syscall.Timeval) float64 { return float64(t.Sec) + float64(t.Usec)/1e6 }
	return tv(u.Utime) + tv(u.Stime)
}

// BenchmarkDecode1080p compares, on vtest.avi's first 90 frames scaled to
// 1920×1080 and encoded to H.264 by ffmpeg, CPU per frame of: OpenCV's
// capture (its thread pool, full BGR) shrunk to 640×360 by INTER_AREA, as
// the daemon did before it decoded directly; a Stream on one thread
// converting straight to 640×360 BGR; a Stream's full-size BGR, on one
// thread and on FFmpeg's choice of threads; a Stream on one thread giving
// the decoder's planes only, with and without the deblocking filter.
func BenchmarkDecode1080p(b *testing.B) {
	path := h264Of(b, reference(b, "vtest.avi"), 90, "1920:1080")
	small := image.Pt(640, 360)
	run := func(b *testing.B, each func() int) {
		frames := 0
		c0, t0 := cpuSeconds(b), time.Now()
		for b.Loop() {
			frames += each()
		}
		if frames > 0 {
			b.ReportMetric(1000*(cpuSeconds(b)-c0)/float64(frames), "cpu-ms/frame")
			b.ReportMetric(float64(time.Since(t0).Milliseconds())/float64(frames), "wall-ms/frame")
		}
	}
	b.Run("opencv-capture+area-resize", func(b *testing.B) {
		full, out := gocv.NewMat(), gocv.NewMat()
		defer full.Close()
		defer out.Close()
		run(b, func() int {
			c, err := gocv.VideoCaptureFile(path)
			require.NoError(b, err)
			defer c.Close()
			n := 0
			for c.Read(&full) && !full.Empty() {
				gocv.Resize(full, &out, small, 0, 0, gocv.InterpolationArea)
				n++
			}
			return n
		})
	})
	own := func(name string, o Options, convert func(s *Stream, m *gocv.Mat) error) {
		b.Run(name, func(b *testing.B) {
			m := gocv.NewMat()
			defer m.Close()
			run(b, func() int {
				s, err := Open(path, o)
				require.NoError(b, err)
				defer s.Close()
				n := 0
				for {
					if _, err := s.Next(); err != nil {
						require.ErrorIs(b, err, io.EOF)
						return n
					}
					require.NoError(b, convert(s, &m))
					n++
				}
			})
		})
	}
	own("stream-1-thread-bgr-640x360", Options{Threads: 1}, func(s *Stream, m *gocv.Mat) error { return s.BGR(m, small) })
	own("stream-1-thread-bgr-full", Options{Threads: 1}, func(s *Stream, m *gocv.Mat) error { return s.BGR(m, image.Point{}) })
	// FFmpeg's choice of threads (one per CPU, as OpenCV's capture asks).
	own("stream-auto-threads-bgr-full", Options{Threads: -1}, func(s *Stream, m *gocv.Mat) error { return s.BGR(m, image.Point{}) })
	// Decoding alone, the planes left as the decoder gives them (what the
	// daemon's detector reads), with and without the deblocking filter.
	planes := func(s *Stream, _ *gocv.Mat) error {
		if _, ok := s.Planes(); !ok {
			return errors.New("no planes")
		}
		return nil
	}
	own("stream-1-thread-planes", Options{Threads: 1}, planes)
	own("stream-1-thread-planes-skip-deblock", Options{Threads: 1, SkipDeblock: true}, planes)
}

// TestSkipDeblock decodes vtest.avi (opencv-doc, people walking) re-encoded
// to H.264 with a key frame every 20, once by OpenCV's capture (the
// reference: the full decode, deblocking filter included) and once by a
// Stream that skips the filter. The option must take effect (frames
// differ from the reference) and the picture the detector works on must
// stay the reference's: averaged into 8 × 8-pixel cells, as the detector
// averages the frame into its grid of cells, each frame differs by under
// a grey level on average, and fewer than 0.5 % of the cells' values by
// more than 4 levels, through the drift between key frames (where
// something moves, later frames are predicted from the unfiltered ones).
// Measured: 0.43 levels at worst, 0.095 % of cells over 4, the largest 15.
func TestSkipDeblock(t *testing.T) {
	path := h264Of(t, reference(t, "vtest.avi"), 60, "")
	ref, err := gocv.VideoCaptureFile(path)
	require.NoError(t, err)
	defer ref.Close()
	s, err := Open(path, Options{SkipDeblock: true})
	require.NoError(t, err)
	defer s.Close()
	want, got := gocv.NewMat(), gocv.NewMat()
	defer want.Close()
	defer got.Close()
	wantCells, gotCells := gocv.NewMat(), gocv.NewMat()
	defer wantCells.Close()
	defer gotCells.Close()
	cellDiff, over := gocv.NewMat(), gocv.NewMat()
	defer cellDiff.Close()
	defer over.Close()
	frames, differ := 0, 0
	over4, cellValues := 0, 0
	worstPixelMean, worstCellMean, worstCell := 0.0, 0.0, 0.0
	for ref.Read(&want) && !want.Empty() {
		_, err := s.Next()
		require.NoError(t, err, "frame %d", frames)
		require.NoError(t, s.BGR(&got, image.Point{}))
		mean, most := absDiff(t, want, got)
		if most > 0 {
			differ++
		}
		worstPixelMean = max(worstPixelMean, mean)
		cells := image.Pt(want.Cols()/8, want.Rows()/8)
		gocv.Resize(want, &wantCells, cells, 0, 0, gocv.InterpolationArea)
		gocv.Resize(got, &gotCells, cells, 0, 0, gocv.InterpolationArea)
		cm, cmost := absDiff(t, wantCells, gotCells)
		worstCellMean, worstCell = max(worstCellMean, cm), max(worstCell, cmost)
		gocv.AbsDiff(wantCells, gotCells, &cellDiff)
		flat := cellDiff.Reshape(1, 0)
		gocv.Threshold(flat, &over, 4, 255, gocv.ThresholdBinary)
		over4 += gocv.CountNonZero(over)
		cellValues += flat.Total()
		flat.Close()
		frames++
	}
	require.Equal(t, 60, frames)
	assert.Greater(t, differ, frames/2, "frames that differ from the deblocked reference")
	assert.Less(t, worstCellMean, 1.0, "worst frame's mean difference over 8 × 8 cells, grey levels")
	share := float64(over4) / float64(cellValues)
	assert.Less(t, share, 0.005, "share of 8 × 8 cells (each channel) more than 4 levels off")
	refdata.Report(t, "vtest h264 without deblocking: %d of %d frames differ from OpenCV's; worst frame mean %.2f levels per pixel, %.2f per 8×8 cell; %.3f %% of cell values more than 4 levels off, the largest %.0f",
		differ, frames, worstPixelMean, worstCellMean, 100*share, worstCell)
}
