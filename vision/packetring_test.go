package vision

import (
	"crypto/sha256"
	"encoding/hex"
	"image"
	"io"
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

	"stillwater/vision/decode"
	"stillwater/vision/refdata"
	"stillwater/vision/rtsptest"
)

// h264Clip re-encodes src to H.264 with ffmpeg (a key frame every
// keyEvery frames, no B-frames, as IP cameras send).
func h264Clip(t *testing.T, src string, keyEvery int) string {
	t.Helper()
	out := filepath.Join(t.TempDir(), "clip.mp4")
	b, err := exec.Command("ffmpeg", "-nostdin", "-loglevel", "error", "-y", "-i", src,
		"-c:v", "libx264", "-g", strconv.Itoa(keyEvery), "-bf", "0", "-pix_fmt", "yuv420p", out).CombinedOutput()
	require.NoError(t, err, "ffmpeg (deploy/setup installs it): %s", b)
	return out
}

// frameSums decodes path with FFmpeg (vision/decode) and returns each
// frame's SHA-256 and presentation time.
func frameSums(t *testing.T, path string) ([]string, []time.Duration) {
	t.Helper()
	s, err := decode.Open(path, decode.Options{})
	require.NoError(t, err)
	defer s.Close()
	m := gocv.NewMat()
	defer m.Close()
	var sums []string
	var pts []time.Duration
	for {
		f, err := s.Next()
		if err == io.EOF {
			return sums, pts
		}
		require.NoError(t, err)
		require.NoError(t, s.BGR(&m, image.Point{}))
		b, err := m.DataPtrUint8()
		require.NoError(t, err)
		h := sha256.Sum256(b)
		sums = append(sums, hex.EncodeToString(h[:]))
		pts = append(pts, f.PTS)
	}
}

// TestPacketClipCopiesTheStream: a camera reading H.264 keeps the
// stream's packets as its pre-roll instead of JPEG pictures, and its clip
// is an MP4 of those packets: from the latest key frame at least the
// pre-roll old, across the seam of a looped file, extended by a second
// StartClip. Decoded with FFmpeg (the reference), every frame of the clip
// is identical to the source frame it copies, in order, a frame interval
// apart.
func TestPacketClipCopiesTheStream(t *testing.T) {
	// 3 s at 10 fps, a key frame every second.
	src := h264Clip(t, smallClip(t, 3), 10)
	want, _ := frameSums(t, src)
	require.Len(t, want, 30)

	cam, err := OpenCamera(SourceConfig{URI: src, Loop: true}, DetectorConfig{ProcessWidth: 160})
	require.NoError(t, err)
	defer cam.Close()
	require.NoError(t, cam.EnableEvidence(EvidenceConfig{PreRoll: 2 * time.Second, PostRoll: 3 * time.Second}))
	var last time.Duration
	for i := 0; i < 40; i++ { // frames 0–39, a loop after frame 29
		r, err := cam.Next(nil)
		require.NoError(t, err)
		last = r.Media
	}
	require.Empty(t, cam.ev.ring, "no JPEG pre-roll for a stream whose packets are kept")
	info, err := cam.StartClip(filepath.Join(t.TempDir(), "clip.avi"))
	require.NoError(t, err)
	assert.Equal(t, ".mp4", filepath.Ext(info.Path))
	// Frame 39 at 3.9 s: the latest key frame at or before 1.9 s is
	// frame 10, so the pre-roll is frames 10–39.
	assert.Equal(t, 30, info.PreRoll)
	for i := 0; i < 15; i++ { // frames 40–54
		_, err := cam.Next(nil)
		require.NoError(t, err)
	}
	info2, err := cam.StartClip(filepath.Join(t.TempDir(), "other.avi"))
	require.NoError(t, err)
	assert.True(t, info2.Extended)
	assert.Equal(t, info.Path, info2.Path)
	n := 55
	for cam.Recording() != "" {
		r, err := cam.Next(nil)
		require.NoError(t, err)
		require.Less(t, r.Media, last+time.Minute, "clip never finished")
		n++
	}
	cam.ev.w.sync()
	// Until 3 s after frame 54 (5.4 s): frame 84 ends it.
	require.Equal(t, 85, n)
	got, pts := frameSums(t, info.Path)
	require.Len(t, got, 85-10)
	for i := range got {
		require.Equal(t, want[(10+i)%30], got[i], "clip frame %d, source frame %d", i, (10+i)%30)
		assert.InDelta(t, float64(i)*0.1, (pts[i] - pts[0]).Seconds(), 1e-3, "clip frame %d's time", i)
	}
	refdata.Report(t, "mp4 clip of %d packets (pre-roll %d from a key frame) decodes to the source's frames, looped seam included", len(got), info.PreRoll)
}

// TestPacketRing holds the ring to its rules on made-up packets: it starts
// at a key frame at least the pre-roll old, never at a packet a decoder
// cannot start from, stays within its bounds when times barely move, and
// gives rising decoding times when the stream starts its times again.
func TestPacketRing(t *testing.T) {
	pkt := func(i int, key bool) decode.Packet {
		return decode.Packet{Data: make([]byte, 10), PTS: int64(i) * 9000, DTS: int64(i) * 9000, Duration: 9000, Key: key}
	}
	tests := []struct {
		name     string
		frames   int
		keyEvery int
		step     time.Duration
		first    int // frame the ring should start at; -1: empty
	}{
		// 10 fps, 2 s pre-roll, key every 10: at frame 49 (4.9 s) the
		// latest key at or before 2.9 s is frame 20.
		{"key every second", 50, 10, 100 * time.Millisecond, 20},
		// No key frame at all: nothing a clip could start from.
		{"no key frame", 50, 0, 100 * time.Millisecond, -1},
		// Times 0.1 ms apart never age past the pre-roll: the count bound
		// moves the start to a later key frame.
		{"stamps 0.1 ms apart", maxRingPackets + 500, 100, 100 * time.Microsecond, -2},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			r := &packetRing{}
			for i := 0; i < tc.frames; i++ {
				key := tc.keyEvery > 0 && i%tc.keyEvery == 0
				r.add([]decode.Packet{pkt(i, key)}, time.Duration(i)*tc.step, 2*time.Second, 10)
				if len(r.ring) > 0 {
					require.True(t, r.ring[0].p.Key, "frame %d: the ring starts at a packet no decoder can start from", i)
				}
				require.LessOrEqual(t, len(r.ring), maxRingPackets)
			}
			switch tc.first {
			case -1:
				assert.Empty(t, r.ring)
			case -2:
				assert.NotEmpty(t, r.ring)
				assert.Greater(t, len(r.ring), maxRingPackets-tc.keyEvery)
			default:
				require.NotEmpty(t, r.ring)
				assert.Equal(t, int64(tc.first)*9000, r.ring[0].p.DTS)
				assert.Len(t, r.ring, tc.frames-tc.first)
			}
			assert.Equal(t, 10*len(r.ring), r.bytes)
		})
	}
	t.Run("empty packets left out", func(t *testing.T) {
		r := &packetRing{}
		kept := r.add([]decode.Packet{pkt(0, true), {PTS: 9000, DTS: 9000}, pkt(2, false)}, 0, time.Second, 10)
		require.Len(t, kept, 2)
		assert.Len(t, r.ring, 2)
		assert.Equal(t, int64(18000), kept[1].DTS)
	})
	t.Run("times start again", func(t *testing.T) {
		r := &packetRing{}
		var dts []int64
		for pass := 0; pass < 3; pass++ {
			for i := 0; i < 5; i++ {
				p := pkt(i, i == 0)
				if pass == 2 {
					p.PTS, p.DTS = decode.NoTime, decode.NoTime // a stream without times
				}
				for _, k := range r.add([]decode.Packet{p}, time.Duration(pass*5+i)*100*time.Millisecond, time.Hour, 10) {
					dts = append(dts, k.DTS)
				}
			}
		}
		for i := range dts {
			assert.Equal(t, int64(i)*9000, dts[i], "packet %d", i)
		}
	})
}

// TestPacketClipOverRTSP: a camera read over RTSP (rtsp-server-perl relay,
// ffmpeg pushing MPEG-4 with a key frame every 10 frames, the codec set up
// by the stream's description) keeps its packets, and its clip decodes
// (FFmpeg, the reference) from its first frame, a key frame, to as many
// frames as the camera read from that key frame on, at the stream's size.
func TestPacketClipOverRTSP(t *testing.T) {
	if testing.Short() {
		t.Skip("runs a live RTSP relay")
	}
	srv := rtsptest.Start(t, smallClip(t, 4), "pool")
	cam, err := OpenCamera(SourceConfig{URI: srv.URL(), Transport: "udp", OpenTimeout: 5 * time.Second, ReadTimeout: 2 * time.Second},
		DetectorConfig{ProcessWidth: 160})
	require.NoError(t, err)
	defer cam.Close()
	require.NoError(t, cam.EnableEvidence(EvidenceConfig{PreRoll: time.Second, PostRoll: time.Second}))
	for i := 0; i < 25; i++ {
		_, err := cam.Next(nil)
		require.NoError(t, err, "frame %d", i)
	}
	info, err := cam.StartClip(filepath.Join(t.TempDir(), "live.avi"))
	require.NoError(t, err)
	require.Equal(t, ".mp4", filepath.Ext(info.Path))
	n := 0
	for cam.Recording() != "" {
		_, err := cam.Next(nil)
		require.NoError(t, err)
		n++
		require.Less(t, n, 100, "clip never finished")
	}
	cam.ev.w.sync()
	require.GreaterOrEqual(t, info.PreRoll, 10, "a second of 10 fps from a key frame")
	s, err := decode.Open(info.Path, decode.Options{})
	require.NoError(t, err)
	defer s.Close()
	assert.Equal(t, cam.Size(), s.Info().Size)
	frames := 0
	for {
		f, err := s.Next()
		if err == io.EOF {
			break
		}
		require.NoError(t, err)
		if frames == 0 {
			assert.True(t, f.Key, "the clip starts at a key frame")
		}
		frames++
	}
	assert.Zero(t, s.Errors(), "damaged packets in the clip")
	// Every packet kept is a frame: the pre-roll and the frames read after.
	assert.Equal(t, info.PreRoll+n, frames)
	refdata.Report(t, "rtsp mpeg4: clip of %d frames (pre-roll %d packets from a key frame), no decode errors", frames, info.PreRoll)
}

// TestPacketClipGapResumesAtKeyFrame: when the evidence writer falls
// behind (the clip's file a named pipe nobody reads yet) the packets it
// cannot take are left out and counted, and so is every packet after them
// up to the next key frame, since those would decode wrong: the clip,
// once written, decodes (FFmpeg, the reference) frame for frame to the
// source's pictures, every packet written is a frame, and it resumes after
// the gap.
func TestPacketClipGapResumesAtKeyFrame(t *testing.T) {
	src := h264Clip(t, smallClip(t, 3), 10)
	cam, reports := recordingCamera(t, src)
	dir := t.TempDir()
	stuck := filepath.Join(dir, "stuck.mp4")
	require.NoError(t, syscall.Mkfifo(stuck, 0o600))
	info, err := cam.StartClip(stuck)
	require.NoError(t, err)
	next := func(n int) {
		for i := 0; i < n; i++ {
			_, err := cam.Next(nil)
			require.NoError(t, err)
		}
	}
	next(400) // more than the writer's queue holds
	copied := filepath.Join(dir, "copied.mp4")
	done := make(chan error, 1)
	go func() {
		in, err := os.Open(stuck)
		if err != nil {
			done <- err
			return
		}
		defer in.Close()
		out, err := os.Create(copied)
		if err != nil {
			done <- err
			return
		}
		_, err = io.Copy(out, in)
		if cerr := out.Close(); err == nil {
			err = cerr
		}
		done <- err
	}()
	require.Eventually(t, func() bool { return len(cam.ev.w.jobs) == 0 }, 20*time.Second, 10*time.Millisecond, "the writer never drained")
	next(100)
	require.NoError(t, cam.Close())
	require.NoError(t, <-done)
	written := reports()
	require.Len(t, written, 1)
	ev := written[0]
	require.NoError(t, ev.Err)
	assert.Equal(t, info.PreRoll+500, ev.Frames+ev.Dropped, "every packet written or counted")
	assert.Positive(t, ev.Dropped)
	// After the drain the clip resumes at the next key frame: all but at
	// most 9 of the last 100 frames are in it.
	assert.GreaterOrEqual(t, ev.Frames, info.PreRoll+evidenceQueue/2+91)

	// Each frame of the clip is one of the source's pictures: a P-frame
	// whose reference was left out would decode to another.
	want, _ := frameSums(t, src)
	source := map[string]bool{}
	for _, w := range want {
		source[w] = true
	}
	got, _ := frameSums(t, copied)
	assert.Equal(t, ev.Frames, len(got))
	frames, wrong := len(got), 0
	for _, g := range got {
		if !source[g] {
			wrong++
		}
	}
	assert.Zero(t, wrong, "frames of the clip that are none of the source's")
	report(t, "evidence: mp4 clip behind a blocked writer: %d packets written, %d left out and counted, %d frames decode, each to one of the source's", ev.Frames, ev.Dropped, frames)
}

// TestPacketsCopiedOnlyForClips: a camera keeping no evidence of its own
// (replay, or clips cut from an evidence stream) copies no packets; once
// it keeps evidence, every frame's packets are taken.
func TestPacketsCopiedOnlyForClips(t *testing.T) {
	src := h264Clip(t, smallClip(t, 1), 10)
	for _, c := range []struct {
		name string
		cfg  *EvidenceConfig
		want bool
	}{
		{"no evidence", nil, false},
		{"clips from an evidence stream", &EvidenceConfig{SnapshotsOnly: true}, false},
		{"clips of its own", &EvidenceConfig{}, true},
	} {
		t.Run(c.name, func(t *testing.T) {
			cam, err := OpenCamera(SourceConfig{URI: src, Loop: true}, DetectorConfig{ProcessWidth: 160})
			require.NoError(t, err)
			defer cam.Close()
			if c.cfg != nil {
				require.NoError(t, cam.EnableEvidence(*c.cfg))
			}
			for i := 0; i < 3; i++ {
				_, err := cam.Next(nil)
				require.NoError(t, err)
			}
			sc := cam.cap.(*streamCapture)
			require.Empty(t, sc.pending, "Next takes what was copied")
			ok, err := sc.grab() // one more frame, not taken by the camera
			require.NoError(t, err)
			require.True(t, ok)
			assert.Equal(t, c.want, len(sc.pending) > 0)
		})
	}
}
