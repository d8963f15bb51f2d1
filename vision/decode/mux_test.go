package decode

import (
	"crypto/sha256"
	"encoding/hex"
	"io"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"

	"stillwater/vision/refdata"
)

// decodedFrames decodes path to full-size BGR and returns each frame's
// SHA-256 and each frame's presentation time in ms.
func decodedFrames(tb testing.TB, path string) (sums []string, ms []float64) {
	tb.Helper()
	s, err := Open(path, Options{})
	require.NoError(tb, err)
	defer s.Close()
	m := gocv.NewMat()
	defer m.Close()
	for {
		f, err := s.Next()
		if err == io.EOF {
			return sums, ms
		}
		require.NoError(tb, err)
		require.NoError(tb, s.BGR(&m, s.Info().Size))
		b, err := m.DataPtrUint8()
		require.NoError(tb, err)
		h := sha256.Sum256(b)
		sums = append(sums, hex.EncodeToString(h[:]))
		ms = append(ms, float64(f.PTS.Microseconds())/1000)
	}
}

// TestPacketsCopyIntoMP4: the packets of a clip from its second key frame
// on, written into an MP4 by Muxer, decode (FFmpeg's decoder, the
// reference) to the very frames the source gives from that key frame, at
// the same spacing; the comment tag reads back with ffprobe. H.264 as IP
// cameras send it (no B-frames), H.264 with B-frames (decoding order
// differs from presentation order) and MPEG-4 part 2.
func TestPacketsCopyIntoMP4(t *testing.T) {
	vtest := func(tb testing.TB) string { return reference(tb, "vtest.avi") }
	cases := []struct {
		name  string
		codec []string
	}{
		{"h264", []string{"-c:v", "libx264", "-g", "20", "-bf", "0", "-pix_fmt", "yuv420p"}},
		{"h264 b-frames", []string{"-c:v", "libx264", "-g", "20", "-bf", "2", "-pix_fmt", "yuv420p"}},
		{"mpeg4", []string{"-c:v", "mpeg4", "-g", "20", "-bf", "0", "-q:v", "4"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			src := encoded(t, vtest(t), 60, "320x240", "clip.mp4", c.codec...)
			want, wantMS := decodedFrames(t, src)
			require.Len(t, want, 60)

			s, err := Open(src, Options{})
			require.NoError(t, err)
			defer s.Close()
			var pkts []Packet
			for {
				_, err := s.Next()
				if err == io.EOF {
					break
				}
				require.NoError(t, err)
				pkts = s.Packets(pkts)
			}
			require.Len(t, pkts, 60, "one packet per frame")
			keys := 0
			first := -1
			for i, p := range pkts {
				if p.Key {
					keys++
					if keys == 2 {
						first = i
					}
				}
			}
			require.Equal(t, 3, keys, "key frames every 20")
			out := filepath.Join(t.TempDir(), "out.mp4")
			mw, err := CreateMP4(out, s.Params(), "span test")
			require.NoError(t, err)
			for _, p := range pkts[first:] {
				require.NoError(t, mw.WritePacket(p))
			}
			assert.Equal(t, 60-first, mw.Packets())
			require.NoError(t, mw.Close())
			require.NoError(t, mw.Close(), "a second Close")

			got, gotMS := decodedFrames(t, out)
			require.Len(t, got, 60-first)
			for i := range got {
				require.Equal(t, want[first+i], got[i], "frame %d of the copy, %d of the source", i, first+i)
				assert.InDelta(t, wantMS[first+i]-wantMS[first], gotMS[i]-gotMS[0], 0.5, "frame %d's time from the first", i)
			}
			b, err := exec.Command("ffprobe", "-v", "error", "-show_entries", "format_tags=comment", "-of", "default=nw=1:nk=1", out).CombinedOutput()
			require.NoError(t, err, "ffprobe: %s", b)
			assert.Equal(t, "span test", strings.TrimSpace(string(b)))
			refdata.Report(t, "%s: %d packets from frame %d copied; every frame decodes identical to the source's", c.name, 60-first, first)
		})
	}
}

// TestMuxerErrors: a file that cannot be created and packets that cannot
// be written are errors naming the file.
func TestMuxerErrors(t *testing.T) {
	s, err := Open(h264Of(t, reference(t, "vtest.avi"), 5, "160x120"), Options{})
	require.NoError(t, err)
	defer s.Close()
	_, err = s.Next()
	require.NoError(t, err)
	pkts := s.Packets(nil)
	require.NotEmpty(t, pkts)

	_, err = CreateMP4(filepath.Join(t.TempDir(), "no", "such", "dir.mp4"), s.Params(), "")
	require.Error(t, err)
	assert.Contains(t, err.Error(), "dir.mp4")

	p := s.Params()
	p.Size.X = 0
	_, err = CreateMP4(filepath.Join(t.TempDir(), "zero.mp4"), p, "")
	assert.ErrorContains(t, err, "frame size")

	out := filepath.Join(t.TempDir(), "back.mp4")
	mw, err := CreateMP4(out, s.Params(), "")
	require.NoError(t, err)
	defer mw.Close()
	require.NoError(t, mw.WritePacket(pkts[0]))
	err = mw.WritePacket(pkts[0]) // the same decoding time again
	require.Error(t, err)
	assert.Contains(t, err.Error(), "back.mp4")
	assert.ErrorContains(t, err, "not after")
	assert.ErrorContains(t, mw.WritePacket(Packet{}), "empty")
	assert.ErrorContains(t, mw.WritePacket(Packet{Data: []byte{0}, PTS: NoTime, DTS: NoTime}), "no time")
}

// TestMP4PlaysBeforeClose: a clip whose writer never finishes (the daemon
// killed mid-clip) keeps what was written: with key frames every 20, after
// 60 packets and no Close the file already decodes (FFmpeg, the
// reference) to the source's first 40 frames, the runs that a later key
// frame closed; Close adds the last run.
func TestMP4PlaysBeforeClose(t *testing.T) {
	src := h264Of(t, reference(t, "vtest.avi"), 60, "320x240")
	want, _ := decodedFrames(t, src)
	require.Len(t, want, 60)
	s, err := Open(src, Options{})
	require.NoError(t, err)
	defer s.Close()
	out := filepath.Join(t.TempDir(), "open.mp4")
	mw, err := CreateMP4(out, s.Params(), "")
	require.NoError(t, err)
	for {
		_, err := s.Next()
		if err == io.EOF {
			break
		}
		require.NoError(t, err)
		for _, p := range s.Packets(nil) {
			require.NoError(t, mw.WritePacket(p))
		}
	}
	got, _ := decodedFrames(t, out)
	require.Len(t, got, 40, "frames readable before Close")
	assert.Equal(t, want[:40], got)
	require.NoError(t, mw.Close())
	got, _ = decodedFrames(t, out)
	assert.Equal(t, want, got, "after Close")
	refdata.Report(t, "mp4 clip left open: %d of 60 frames readable before Close, all after", 40)
}
