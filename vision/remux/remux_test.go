package remux

import (
	"bytes"
	"context"
	"encoding/json"
	"log/slog"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// h264Clip encodes a test pattern (FFmpeg's testsrc2) as H.264 at the
// given size, 15 fps, a key frame every second, no B-frames (as IP
// cameras send it, common practice).
func h264Clip(t *testing.T, w, h int, seconds float64) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), "main.mp4")
	out, err := exec.Command("ffmpeg", "-nostdin", "-loglevel", "error", "-f", "lavfi",
		"-i", "testsrc2=size="+strconv.Itoa(w)+"x"+strconv.Itoa(h)+":rate=15:duration="+strconv.FormatFloat(seconds, 'f', -1, 64),
		"-c:v", "libx264", "-preset", "ultrafast", "-g", "15", "-bf", "0", "-pix_fmt", "yuv420p", "-y", p).CombinedOutput()
	require.NoError(t, err, "ffmpeg (deploy/setup installs it): %s", out)
	return p
}

// probe is what ffprobe says about a clip.
type probe struct {
	Codec    string
	W, H     int
	Duration float64
	Created  time.Time
	Comment  string
}

func ffprobe(t *testing.T, path string) probe {
	t.Helper()
	out, err := exec.Command("ffprobe", "-v", "error", "-select_streams", "v:0",
		"-show_entries", "stream=codec_name,width,height:format=duration:format_tags=creation_time,comment", "-of", "json", path).Output()
	require.NoError(t, err)
	var v struct {
		Streams []struct {
			Codec  string `json:"codec_name"`
			Width  int    `json:"width"`
			Height int    `json:"height"`
		} `json:"streams"`
		Format struct {
			Duration string            `json:"duration"`
			Tags     map[string]string `json:"tags"`
		} `json:"format"`
	}
	require.NoError(t, json.Unmarshal(out, &v), "%s", out)
	require.Len(t, v.Streams, 1)
	d, err := strconv.ParseFloat(v.Format.Duration, 64)
	require.NoError(t, err)
	p := probe{Codec: v.Streams[0].Codec, W: v.Streams[0].Width, H: v.Streams[0].Height, Duration: d}
	p.Comment = v.Format.Tags["comment"]
	if c := v.Format.Tags["creation_time"]; c != "" {
		p.Created, err = time.Parse(time.RFC3339Nano, c)
		require.NoError(t, err)
	}
	return p
}

// commentSpan reads the span a clip's comment names.
func commentSpan(t *testing.T, c string) (from, to time.Time) {
	t.Helper()
	f := strings.Fields(c)
	require.GreaterOrEqual(t, len(f), 3, "comment %q", c)
	from, err := time.Parse(time.RFC3339Nano, f[len(f)-3])
	require.NoError(t, err)
	to, err = time.Parse(time.RFC3339Nano, f[len(f)-1])
	require.NoError(t, err)
	return from, to
}

// frameHashes decodes a clip with ffmpeg and returns each frame's MD5.
func frameHashes(t *testing.T, path string) []string {
	t.Helper()
	out, err := exec.Command("ffmpeg", "-nostdin", "-loglevel", "error", "-i", path, "-map", "0:v:0", "-f", "framemd5", "-").Output()
	require.NoError(t, err)
	var hs []string
	for _, l := range strings.Split(string(out), "\n") {
		if l == "" || l[0] == '#' {
			continue
		}
		f := strings.Split(l, ",")
		hs = append(hs, strings.TrimSpace(f[len(f)-1]))
	}
	return hs
}

// cyclicRun reports whether sub appears in the looped sequence all.
func cyclicRun(all, sub []string) bool {
	for i := range all {
		ok := true
		for k, h := range sub {
			if all[(i+k)%len(all)] != h {
				ok = false
				break
			}
		}
		if ok {
			return true
		}
	}
	return false
}

// syncBuf is a log sink safe for the recorder's goroutines.
type syncBuf struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuf) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuf) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

// TestRecorderKeepsPreRollAndCutsClip copies a looping 1280×720 H.264
// file played in real time into the ring and asks for a clip of 2 s
// before to 1 s after a moment. ffprobe (FFmpeg, the reference here)
// must find H.264 at 1280×720 spanning the whole request, and FFmpeg's
// decoder must give frames bit-identical to a run of the source's own
// frames: the stream was copied, not decoded and encoded again. The ring
// holds only about the pre-roll. Then the child is killed: its exit is
// logged and reported, and a new child writes again.
func TestRecorderKeepsPreRollAndCutsClip(t *testing.T) {
	src := h264Clip(t, 1280, 720, 4)
	dir := t.TempDir()
	var logBuf syncBuf
	states := make(chan bool, 16)
	rec, err := New(Config{Source: src, Realtime: true, Loop: true, Dir: filepath.Join(dir, "ring"), Segment: time.Second, Keep: 3 * time.Second,
		Log:     slog.New(slog.NewTextHandler(&logBuf, nil)),
		OnState: func(up bool, _ error) { states <- up }})
	require.NoError(t, err)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	ran := make(chan error, 1)
	go func() { ran <- rec.Run(ctx) }()
	waitState(t, states, true, 10*time.Second)

	time.Sleep(6 * time.Second) // longer than Keep: old segments must go
	segs, err := filepath.Glob(filepath.Join(dir, "ring", "seg-*.ts"))
	require.NoError(t, err)
	// Keep (3 s) and one segment of 1 s behind the newest, and the one
	// being written: at most 6 files of about 1 s.
	assert.LessOrEqual(t, len(segs), 6, "the ring holds only the pre-roll: %v", segs)

	at := time.Now().Add(-time.Second)
	results := make(chan ClipResult, 1)
	clip := filepath.Join(dir, "alarm.mp4")
	got, extended := rec.Clip(clip, at, 2*time.Second, time.Second, func(r ClipResult) { results <- r })
	assert.Equal(t, clip, got)
	assert.False(t, extended)
	// A second alarm inside the first one's span extends it.
	got, extended = rec.Clip(filepath.Join(dir, "other.mp4"), at.Add(500*time.Millisecond), 2*time.Second, time.Second, nil)
	assert.Equal(t, clip, got)
	assert.True(t, extended)
	var res ClipResult
	select {
	case res = <-results:
	case <-time.After(20 * time.Second):
		t.Fatal("no clip within 20 s")
	}
	require.NoError(t, res.Err)
	wantFrom, wantTo := at.Add(-2*time.Second), at.Add(1500*time.Millisecond)
	assert.False(t, res.From.After(wantFrom), "clip starts %v, want by %v", res.From, wantFrom)
	assert.False(t, res.To.Before(wantTo), "clip ends %v, want from %v", res.To, wantTo)

	p := ffprobe(t, clip)
	assert.Equal(t, "h264", p.Codec)
	assert.Equal(t, 1280, p.W)
	assert.Equal(t, 720, p.H)
	span := wantTo.Sub(wantFrom).Seconds()
	assert.GreaterOrEqual(t, p.Duration, span-0.2, "the clip's own length covers the span asked for")
	// MP4 keeps creation_time in whole seconds; the comment has the span.
	assert.WithinDuration(t, res.From, p.Created, time.Second, "creation_time says when the clip starts")
	from, to := commentSpan(t, p.Comment)
	assert.WithinDuration(t, res.From, from, time.Microsecond)
	assert.WithinDuration(t, res.To, to, time.Microsecond)
	assert.True(t, cyclicRun(frameHashes(t, src), frameHashes(t, clip)), "the clip's frames are a run of the source's frames, bit for bit")
	_, err = os.Stat(clip + ".part")
	assert.True(t, os.IsNotExist(err))

	// The child dies: logged, reported, restarted.
	pid := rec.PID()
	require.NotZero(t, pid)
	require.NoError(t, syscall.Kill(pid, syscall.SIGKILL))
	waitState(t, states, false, 5*time.Second)
	waitState(t, states, true, 15*time.Second)
	assert.NotEqual(t, pid, rec.PID())
	assert.Contains(t, logBuf.String(), "evidence recorder exited; restarting")

	// Stopping kills the child and returns.
	pid = rec.PID()
	cancel()
	select {
	case err := <-ran:
		require.NoError(t, err)
	case <-time.After(5 * time.Second):
		t.Fatal("Run did not return within 5 s")
	}
	assert.ErrorIs(t, syscall.Kill(pid, 0), syscall.ESRCH, "the child is gone")
	t.Logf("clip: %d segments, %.2f s, cut %.2f s after the request", res.Segments, p.Duration, res.Took.Seconds())
}

func waitState(t *testing.T, states <-chan bool, want bool, limit time.Duration) {
	t.Helper()
	deadline := time.After(limit)
	for {
		select {
		case up := <-states:
			if up == want {
				return
			}
		case <-deadline:
			t.Fatalf("recorder not up=%v within %v", want, limit)
		}
	}
}

// TestRecorderMissingSourceRetries gives the recorder a file that is not
// there: each child fails, the failure is logged with ffmpeg's own
// message, and the recorder keeps trying until stopped.
func TestRecorderMissingSourceRetries(t *testing.T) {
	dir := t.TempDir()
	var logBuf syncBuf
	rec, err := New(Config{Source: filepath.Join(dir, "nothing.mp4"), Dir: filepath.Join(dir, "ring"), MinBackoff: 50 * time.Millisecond, MaxBackoff: 200 * time.Millisecond,
		Log: slog.New(slog.NewTextHandler(&logBuf, nil))})
	require.NoError(t, err)
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Second)
	defer cancel()
	require.NoError(t, rec.Run(ctx))
	log := logBuf.String()
	assert.GreaterOrEqual(t, strings.Count(log, "evidence recorder exited; restarting"), 3, log)
	assert.Contains(t, log, "nothing.mp4: No such file or directory")
}

func TestNewRefusesBadConfig(t *testing.T) {
	for _, tc := range []struct {
		name string
		cfg  Config
		want string
	}{
		{"no source", Config{Dir: t.TempDir()}, "no source"},
		{"no dir", Config{Source: "x.mp4"}, "no ring directory"},
		{"pipe in dir", Config{Source: "x.mp4", Dir: "/tmp/a|b"}, "must not contain |"},
		{"transport", Config{Source: "rtsp://h/s", Dir: t.TempDir(), Transport: "sctp"}, "transport"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := New(tc.cfg)
			require.Error(t, err)
			assert.Contains(t, err.Error(), tc.want)
		})
	}
}

func TestRedact(t *testing.T) {
	assert.Equal(t, "rtsp://u:xxxxx@h/s", redact("rtsp://u:pw@h/s"))
	assert.Equal(t, "rtsp://h/s", redact("rtsp://h/s"))
	assert.Equal(t, "/data/clip.mp4", redact("/data/clip.mp4"))
}
