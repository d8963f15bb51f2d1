package vision

import (
	"image"
	"image/color"
	"path/filepath"
	"sort"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"

	"stillwater/vision/rtsptest"
)

func TestBacklogObserve(t *testing.T) {
	ms := func(v int) time.Duration { return time.Duration(v) * time.Millisecond }
	type read struct {
		wall, stream int // ms
		waited       bool
		lag          int // ms, want
	}
	cases := []struct {
		name  string
		reads []read
	}{
		{"a reader keeping up waits on every read: no lag", []read{
			{1000, 0, true, 0}, {1100, 100, true, 0}, {1200, 200, true, 0}}},
		{"a slow reader takes queued frames: the lag grows", []read{
			{1000, 0, true, 0}, {1300, 100, false, 200}, {1600, 200, false, 400}, {1900, 300, false, 600}}},
		{"a frame that came sooner than the baseline lowers it", []read{
			{1000, 0, false, 0}, {1050, 100, false, 0}, {1400, 200, false, 250}}},
		{"the stream clock running slow is followed by the reads that wait", []read{
			{1000, 0, true, 0}, {61010, 60000, true, 0}, {61400, 60100, false, 290}}},
		{"a jump back in stream time is forgotten at the next wait", []read{
			{1000, 5000, true, 0}, {1100, 100, false, 5000}, {1200, 200, true, 0}, {1300, 300, true, 0}}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			var b backlog
			for i, r := range c.reads {
				assert.Equal(t, ms(r.lag), b.observe(ms(r.wall), ms(r.stream), r.waited), "read %d", i)
			}
		})
	}
}

// The frame-number clip: each frame carries its index as 10 black or white
// cells, so a reader can tell how old the frame it holds is.
const (
	codeBits = 10
	codeFPS  = 10
)

func codeClip(t *testing.T, frames int) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), "code.avi")
	w, err := gocv.VideoWriterFile(p, "MJPG", codeFPS, 320, 240, true)
	require.NoError(t, err)
	defer w.Close()
	require.True(t, w.IsOpened())
	m := gocv.NewMatWithSize(240, 320, gocv.MatTypeCV8UC3)
	defer m.Close()
	for i := 0; i < frames; i++ {
		m.SetTo(gocv.NewScalar(90, 120, 60, 0))
		for b := 0; b < codeBits; b++ {
			c := color.RGBA{0, 0, 0, 0}
			if i>>b&1 == 1 {
				c = color.RGBA{255, 255, 255, 0}
			}
			gocv.Rectangle(&m, image.Rect(b*32+2, 100, b*32+30, 140), c, -1)
		}
		require.NoError(t, w.Write(m))
	}
	return p
}

// readCode returns the frame's index; ok is false when a cell is neither
// black nor white (a frame decoded without its key frame is mid-grey).
func readCode(m gocv.Mat) (n int, ok bool) {
	for b := 0; b < codeBits; b++ {
		switch v := m.GetVecbAt(120, b*32+16)[1]; {
		case v > 200:
			n |= 1 << b
		case v >= 60:
			return 0, false
		}
	}
	return n, true
}

// TestSlowReaderStaysLive reads the frame-number clip from the RTSP relay
// with a reader that takes 0.25 s per frame of a 10 fps stream, once with
// the catch-up off and once with the default MaxLag. A frame's age is the
// wall time it was read minus its index's place in the pushed stream
// (ffmpeg -re pushes in real time), less the age at a reader that keeps up.
func TestSlowReaderStaysLive(t *testing.T) {
	if testing.Short() {
		t.Skip("runs a live RTSP relay for about 40 s")
	}
	clip := codeClip(t, 1000)
	run := func(maxLag time.Duration) (ages []time.Duration, st CaptureStats) {
		srv := rtsptest.Start(t, clip, "code")
		defer srv.Close()
		cam, err := OpenCamera(SourceConfig{URI: srv.URL(), Transport: "udp", OpenTimeout: 5 * time.Second, ReadTimeout: 5 * time.Second, MaxLag: maxLag},
			DetectorConfig{ProcessWidth: 160, LearningRate: -1})
		require.NoError(t, err)
		defer cam.Close()
		age := func() (time.Duration, bool) {
			n, ok := readCode(cam.frame)
			return time.Since(cam.started) - time.Duration(n)*time.Second/codeFPS, ok
		}
		// Keep up for 2 s of readable frames: the smallest age is the
		// pipeline's own delay.
		base := time.Duration(1 << 62)
		for n := 0; n < 2*codeFPS; {
			_, err := cam.Next(nil)
			require.NoError(t, err)
			if a, ok := age(); ok {
				base = min(base, a)
				n++
			}
		}
		for t0 := time.Now(); time.Since(t0) < 12*time.Second; {
			_, err := cam.Next(nil)
			require.NoError(t, err)
			a, ok := age()
			require.True(t, ok, "frame %d: unreadable frame number", len(ages))
			ages = append(ages, a-base)
			time.Sleep(250 * time.Millisecond)
		}
		return ages, cam.Stats()
	}
	off, offStats := run(-1)
	on, onStats := run(0)
	// The last quarter of each run, when a queue has had time to build.
	tail := func(a []time.Duration) []time.Duration { return a[len(a)*3/4:] }
	offWorst, onWorst := sorted(tail(off)), sorted(tail(on))
	assert.Greater(t, offWorst[0], 3*time.Second, "without catching up the reader should fall behind (else the test shows nothing)")
	assert.Zero(t, offStats.Dropped)
	assert.Less(t, onWorst[len(onWorst)-1], time.Second, "with MaxLag 500 ms the frames searched stay live")
	assert.Positive(t, onStats.Dropped)
	report(t, "backlog: reader at 0.25 s per frame of a 10 fps RTSP stream for 12 s: frame age in the last quarter %v–%v with catch-up off, %v–%v with MaxLag 500 ms (%d of %d frames dropped)",
		offWorst[0].Round(10*time.Millisecond), offWorst[len(offWorst)-1].Round(10*time.Millisecond),
		onWorst[0].Round(10*time.Millisecond), onWorst[len(onWorst)-1].Round(10*time.Millisecond), onStats.Dropped, onStats.FramesRead)
}

// sorted returns a sorted copy.
func sorted(a []time.Duration) []time.Duration {
	out := append([]time.Duration(nil), a...)
	sort.Slice(out, func(i, j int) bool { return out[i] < out[j] })
	return out
}
