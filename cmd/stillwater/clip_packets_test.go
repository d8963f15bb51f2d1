package main

import (
	"encoding/json"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/demo"
	"stillwater/cmd/stillwater/internal/tuning"
	"stillwater/vision/decode"
)

// TestDaemonClipCopiesH264Packets: the daemon searching an H.264 stream
// (the floating child scene, re-encoded by ffmpeg with a key frame a
// second) keeps the stream's packets as its pre-roll, and the alarm's
// clip is an .mp4 beside the snapshot, not a Motion-JPEG .avi: H.264 at
// the stream's size, starting at a key frame, decoding (FFmpeg, the
// reference) without an error over more than the pre-roll's frames.
func TestDaemonClipCopiesH264Packets(t *testing.T) {
	if testing.Short() {
		t.Skip("plays a 20 s clip in real time")
	}
	truth, mjpeg, dir := renderScene(t, "child", 7, tuning.FloatingChild)
	clip := filepath.Join(t.TempDir(), "child.mp4")
	out, err := exec.Command("ffmpeg", "-nostdin", "-loglevel", "error", "-y", "-i", mjpeg,
		"-c:v", "libx264", "-g", "10", "-bf", "0", "-pix_fmt", "yuv420p", clip).CombinedOutput()
	require.NoError(t, err, "ffmpeg (deploy/setup installs it): %s", out)
	cfg := demo.Config(truth, clip, dir, true)
	require.NoError(t, cfg.Validate())
	log, stop := startDaemon(t, cfg)
	defer stop()
	require.Eventually(t, func() bool { return len(log.bySubject("stillwater.demo.target")) > 0 }, 30*time.Second, 100*time.Millisecond,
		"no target")
	var first alert.Target
	require.NoError(t, json.Unmarshal(log.bySubject("stillwater.demo.target")[0].Data, &first))
	require.NotEmpty(t, first.Evidence)
	base := strings.TrimSuffix(filepath.Join(cfg.DataDir, first.Evidence), ".jpg")
	require.NoError(t, stop(), "stopping finishes the clip")
	_, err = os.Stat(base + ".avi")
	assert.ErrorIs(t, err, os.ErrNotExist, "a JPEG clip as well")

	s, err := decode.Open(base+".mp4", decode.Options{})
	require.NoError(t, err, "no .mp4 clip beside the snapshot")
	defer s.Close()
	in := s.Info()
	assert.Equal(t, "h264", in.Codec)
	assert.Equal(t, truth.Width, in.Size.X)
	assert.Equal(t, truth.Height, in.Size.Y)
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
	assert.Zero(t, s.Errors(), "frames decoded with errors")
	// 5 s of pre-roll at the clip's rate at least.
	assert.Greater(t, float64(frames), 5*in.FPS)
	t.Logf("clip %s: %d frames, %v, %.1f fps", filepath.Base(base+".mp4"), frames, in.Size, in.FPS)
}
