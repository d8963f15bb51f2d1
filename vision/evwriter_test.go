package vision

import (
	"image"
	"io"
	"os"
	"path/filepath"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"

	"stillwater/vision/decode"
)

// TestAVIReadsBackInOpenCV writes a clip of JPEG frames with the Go AVI
// writer and reads it back with OpenCV's FFmpeg backend, the reference
// reader: every frame is there, at the right size and rate, and each
// decodes to the picture its JPEG holds.
func TestAVIReadsBackInOpenCV(t *testing.T) {
	frames := readFrames(t, smallClip(t, 1.5))
	defer closeAll(frames)
	var jpgs [][]byte
	for _, f := range frames {
		b, err := encodeJPEG(f, 80)
		require.NoError(t, err)
		jpgs = append(jpgs, b)
	}
	out := filepath.Join(t.TempDir(), "clip.avi")
	a, err := createAVI(out, 320, 240, 12.5)
	require.NoError(t, err)
	for _, b := range jpgs {
		require.NoError(t, a.add(b))
	}
	require.NoError(t, a.close())

	vc, err := gocv.VideoCaptureFile(out)
	require.NoError(t, err)
	defer vc.Close()
	assert.InDelta(t, 12.5, vc.Get(gocv.VideoCaptureFPS), 0.01)
	assert.InDelta(t, float64(len(jpgs)), vc.Get(gocv.VideoCaptureFrameCount), 0.5)
	m := gocv.NewMat()
	defer m.Close()
	n := 0
	for vc.Read(&m) && !m.Empty() {
		require.Less(t, n, len(jpgs), "more frames than written")
		want, err := gocv.IMDecode(jpgs[n], gocv.IMReadColor)
		require.NoError(t, err)
		diff := gocv.NewMat()
		gocv.AbsDiff(m, want, &diff)
		mean := diff.Mean()
		diff.Close()
		want.Close()
		// Two JPEG decoders: FFmpeg's converts 4:2:0 chroma to BGR through
		// swscale, libjpeg upsamples it its own way (measured: 1.1 grey
		// levels apart on average); the picture is the same.
		assert.Less(t, (mean.Val1+mean.Val2+mean.Val3)/3, 2.0, "frame %d", n)
		assert.Equal(t, 320, m.Cols())
		assert.Equal(t, 240, m.Rows())
		n++
	}
	assert.Equal(t, len(jpgs), n)
}

// TestRingHoldsOnlyThePreRoll: the pre-roll ring keeps PreRoll of frames
// at the clip rate and the newest, also for a source whose timestamps
// barely move (stepped by 1 ms), which a bound on media time alone would
// let grow without limit.
func TestRingHoldsOnlyThePreRoll(t *testing.T) {
	m := gocv.NewMatWithSize(24, 32, gocv.MatTypeCV8UC3)
	defer m.Close()
	tests := []struct {
		name string
		step time.Duration
		want int
	}{
		{"10 fps", 100 * time.Millisecond, 20}, // 2 s: media in (t−2 s, t]
		{"stamps 1 ms apart", time.Millisecond, 21},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			e := &evidence{cfg: EvidenceConfig{PreRoll: 2 * time.Second, Quality: 80}, fps: 10}
			for i := 0; i < 500; i++ {
				require.NoError(t, e.add(image.Pt(m.Cols(), m.Rows()), func() (gocv.Mat, error) { return m, nil }, time.Duration(i)*tc.step, nil, decode.Params{}, false))
				require.LessOrEqual(t, len(e.ring), e.ringCap())
			}
			assert.Equal(t, tc.want, len(e.ring))
		})
	}
}

// recordingCamera opens src in a loop with evidence on (pre-roll 1 s,
// post-roll an hour) and reads 15 frames; reports returns what the
// evidence writer has reported so far.
func recordingCamera(t *testing.T, src string) (cam *Camera, reports func() []EvidenceWritten) {
	t.Helper()
	cam, err := OpenCamera(SourceConfig{URI: src, Loop: true}, DetectorConfig{ProcessWidth: 160})
	require.NoError(t, err)
	var mu sync.Mutex
	var written []EvidenceWritten
	require.NoError(t, cam.EnableEvidence(EvidenceConfig{PreRoll: time.Second, PostRoll: time.Hour, OnWritten: func(ev EvidenceWritten) {
		mu.Lock()
		written = append(written, ev)
		mu.Unlock()
	}}))
	for i := 0; i < 15; i++ {
		_, err := cam.Next(nil)
		require.NoError(t, err)
	}
	return cam, func() []EvidenceWritten {
		mu.Lock()
		defer mu.Unlock()
		return append([]EvidenceWritten(nil), written...)
	}
}

// TestEvidenceWriterNeverHoldsUpFrames points a clip at a named pipe with
// no reader, where the writer's open(2) blocks in the kernel: StartClip
// and SaveSnapshot return at once, every frame is still read, the frames
// the writer could not take are counted, and once the pipe has a reader
// the writer finishes and Close returns.
func TestEvidenceWriterNeverHoldsUpFrames(t *testing.T) {
	cam, reports := recordingCamera(t, smallClip(t, 2))
	stuck := filepath.Join(t.TempDir(), "stuck.avi")
	require.NoError(t, syscall.Mkfifo(stuck, 0o600))
	t0 := time.Now()
	info, err := cam.StartClip(stuck)
	require.NoError(t, err)
	startTook := time.Since(t0)
	assert.Equal(t, 10, info.PreRoll)

	const frames = 600 // more than the writer's queue holds
	read := make(chan error, 1)
	go func() {
		for i := 0; i < frames; i++ {
			if _, err := cam.Next(nil); err != nil {
				read <- err
				return
			}
		}
		read <- nil
	}()
	select {
	case err := <-read:
		require.NoError(t, err)
	case <-time.After(60 * time.Second):
		t.Fatal("frames stopped while the evidence writer was blocked")
	}
	snap := filepath.Join(t.TempDir(), "snap.jpg")
	snapErr := cam.SaveSnapshot(snap, Annotation{Caption: "writer blocked"})
	// The queue is full: the snapshot is refused at once, not waited for.
	require.ErrorIs(t, snapErr, errWriterBehind)

	// A reader comes: the writer's open returns and it drains its queue.
	drained := make(chan int64, 1)
	go func() {
		f, err := os.Open(stuck)
		if err != nil {
			drained <- -1
			return
		}
		defer f.Close()
		n, _ := io.Copy(io.Discard, f)
		drained <- n
	}()
	require.NoError(t, cam.Close())
	assert.Greater(t, <-drained, int64(0))
	written := reports()
	require.Len(t, written, 1)
	ev := written[0]
	assert.Equal(t, "clip", ev.Kind)
	// The queue held evidenceQueue frames; the rest were left out and
	// counted.
	assert.Equal(t, frames, ev.Frames-info.PreRoll+ev.Dropped)
	assert.Positive(t, ev.Dropped)
	report(t, "evidence: StartClip returned in %v with the clip's open blocked; %d frames read meanwhile, %d left out of the clip and counted",
		startTook.Round(time.Microsecond), frames, ev.Dropped)
}
