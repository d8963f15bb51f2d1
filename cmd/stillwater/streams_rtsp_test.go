package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/daemon"
	"stillwater/cmd/stillwater/internal/demo"
	"stillwater/cmd/stillwater/internal/watch"
	"stillwater/vision/refdata"
	"stillwater/vision/rtsptest"
)

// lockedBuf is a log sink safe for the daemon's goroutines.
type lockedBuf struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *lockedBuf) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *lockedBuf) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

// TestTwoStreamsOverRTSP runs a camera of two live streams on loopback
// (Debian's rtsp-server-perl relay, ffmpeg pushing over UDP): a 640×480
// sub stream and a 1280×960 main stream of the same scene, calibrated on
// the main stream. Checked:
//
//   - detection runs on the sub stream (the camera opens at 640×480) and
//     the child is found through the scaled calibration;
//   - the alarm clip comes from the main stream without decoding it:
//     ffprobe (FFmpeg, the reference) finds MPEG-4 at 1280×960, as
//     pushed, and the span the clip covers reaches from the pre-roll
//     before the alarm frame to the post-roll after it;
//   - killing the copying ffmpeg is logged, it is started again, and
//     detection goes on meanwhile: frames keep being processed and no
//     camera fault is raised.
func TestTwoStreamsOverRTSP(t *testing.T) {
	if testing.Short() {
		t.Skip("runs two live RTSP relays for about a minute")
	}
	truth, small, dir := renderScene(t, "child", 7, nil)
	big := filepath.Join(dir, "main.avi")
	out, err := exec.Command("ffmpeg", "-nostdin", "-loglevel", "error", "-i", small, "-vf", "scale=1280:960", "-c:v", "mjpeg", "-q:v", "3", "-y", big).CombinedOutput()
	require.NoError(t, err, "ffmpeg (deploy/setup installs it): %s", out)
	sub := rtsptest.Start(t, small, "sub")
	main := rtsptest.Start(t, big, "main")

	cfg := demo.Config(truth, small, dir, false)
	const pre, post = 3 * time.Second, 3 * time.Second
	cfg.Evidence.PreRoll, cfg.Evidence.PostRoll = config.Duration(pre), config.Duration(post)
	cam := &cfg.Cameras[0]
	cam.ID, cam.Source, cam.Transport = "pool", sub.URL(), "udp"
	cam.EvidenceSource = main.URL()
	for i := range cam.Corners {
		cam.Corners[i] = [2]float64{cam.Corners[i][0] * 2, cam.Corners[i][1] * 2}
	}
	cam.Frame, cam.SourcePx = [2]int{1280, 960}, [2]int{640, 480}
	require.NoError(t, cfg.Validate())
	logs := &lockedBuf{}
	bus, httpAddr, stop := startDaemonLogged(t, cfg, logs)

	const targets, faults = "stillwater.pool.target", "stillwater.pool.fault"
	require.Eventually(t, func() bool { return len(bus.bySubject(targets)) > 0 }, 60*time.Second, 50*time.Millisecond,
		"no target from the child in the sub stream")
	assert.Contains(t, logs.String(), `msg="camera open"`)
	assert.Contains(t, logs.String(), `size=(640,480)`, "the camera decodes the sub stream")
	var first alert.Target
	require.NoError(t, json.Unmarshal(bus.bySubject(targets)[0].Data, &first))
	require.Equal(t, "start", first.Event)
	snap := filepath.Join(cfg.DataDir, first.Evidence)
	clip := strings.TrimSuffix(snap, ".jpg") + ".mp4"
	if !assert.Eventually(t, func() bool { _, err := os.Stat(clip); return err == nil }, pre+post+20*time.Second, 100*time.Millisecond,
		"no clip %s from the evidence stream\n%s", clip, logs.String()) {
		out, _ := exec.Command("ls", "-l", "--time-style=full-iso", watch.RingDir(cfg, "pool")).CombinedOutput()
		t.Fatalf("ring:\n%s", out)
	}

	p := probeClip(t, clip)
	assert.Equal(t, "mpeg4", p.Codec, "the main stream's codec, copied")
	assert.Equal(t, [2]int{1280, 960}, [2]int{p.W, p.H}, "the main stream's size, not the sub stream's")
	from, to := clipSpan(t, p.Comment)
	alarm := first.FrameTime
	assert.False(t, from.After(alarm.Add(-pre)), "the clip starts %v before the alarm frame, want %v", alarm.Sub(from), pre)
	assert.False(t, to.Before(alarm.Add(post)), "the clip ends %v after the alarm frame, want %v", to.Sub(alarm), post)
	assert.GreaterOrEqual(t, p.Duration, (pre+post).Seconds()-0.3, "the clip's own length")

	// The copying ffmpeg dies.
	pid := childWith(t, watch.RingDir(cfg, "pool"))
	before := scrapeValue(t, httpAddr, `stillwater_frames_processed_total{camera="pool"}`)
	killed := time.Now()
	require.NoError(t, syscall.Kill(pid, syscall.SIGKILL))
	require.Eventually(t, func() bool { return strings.Count(logs.String(), "evidence recorder writing") >= 2 }, 20*time.Second, 100*time.Millisecond,
		"the evidence recorder did not come back\n%s", logs.String())
	back := time.Since(killed)
	assert.Contains(t, logs.String(), "evidence recorder exited; restarting")
	assert.Equal(t, 1.0, scrapeValue(t, httpAddr, `stillwater_evidence_recorder_exits_total{camera="pool"}`))
	after := scrapeValue(t, httpAddr, `stillwater_frames_processed_total{camera="pool"}`)
	assert.Greater(t, after-before, back.Seconds(), "detection goes on while the evidence stream is down (10 fps stream)")
	for _, m := range bus.bySubject(faults) {
		var f alert.Fault
		require.NoError(t, json.Unmarshal(m.Data, &f))
		assert.False(t, f.Active && m.At.After(killed), "fault %s raised while the evidence recorder was down", f.Fault)
	}
	require.NoError(t, stop())
	assert.Zero(t, childWithOrZero(watch.RingDir(cfg, "pool")), "the copying ffmpeg ends with the daemon")
	refdata.Report(t, "two streams: alarm clip from the 1280×960 main stream (%s, %.1f s, from %.2f s before to %.2f s after the alarm frame); evidence ffmpeg back %.1f s after it was killed, %.0f frames searched meanwhile",
		p.Codec, p.Duration, alarm.Sub(from).Seconds(), to.Sub(alarm).Seconds(), back.Seconds(), after-before)
}

// startDaemonLogged is startDaemon with the daemon's log kept in logs.
func startDaemonLogged(t *testing.T, cfg config.Config, logs io.Writer) (*busLog, string, func() error) {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	bus := &busLog{}
	ready := make(chan [2]string, 1)
	done := make(chan error, 1)
	go func() {
		done <- daemon.Serve(ctx, cfg, daemon.Deps{
			Log:   slog.New(slog.NewTextHandler(logs, nil)),
			Ready: func(busURL, httpAddr string) { ready <- [2]string{busURL, httpAddr} },
		})
	}()
	var r [2]string
	select {
	case r = <-ready:
	case err := <-done:
		cancel()
		t.Fatalf("daemon ended before it was ready: %v", err)
	case <-time.After(20 * time.Second):
		cancel()
		t.Fatal("daemon not ready within 20 s")
	}
	nc, err := nats.Connect(r[0])
	require.NoError(t, err)
	_, err = nc.Subscribe(cfg.Bus.Prefix+".>", bus.add)
	require.NoError(t, err)
	require.NoError(t, nc.Flush())
	var once sync.Once
	var result error
	stop := func() error {
		once.Do(func() {
			cancel()
			select {
			case result = <-done:
			case <-time.After(20 * time.Second):
				result = context.DeadlineExceeded
			}
			nc.Close()
		})
		return result
	}
	t.Cleanup(func() { stop() })
	return bus, r[1], stop
}

// clipProbe is what ffprobe says about a clip.
type clipProbe struct {
	Codec    string
	W, H     int
	Duration float64
	Comment  string
}

func probeClip(t *testing.T, path string) clipProbe {
	t.Helper()
	out, err := exec.Command("ffprobe", "-v", "error", "-select_streams", "v:0",
		"-show_entries", "stream=codec_name,width,height:format=duration:format_tags=comment", "-of", "json", path).Output()
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
	return clipProbe{Codec: v.Streams[0].Codec, W: v.Streams[0].Width, H: v.Streams[0].Height, Duration: d, Comment: v.Format.Tags["comment"]}
}

// clipSpan reads the wall-clock span the clip's comment names.
func clipSpan(t *testing.T, c string) (from, to time.Time) {
	t.Helper()
	f := strings.Fields(c)
	require.GreaterOrEqual(t, len(f), 3, "comment %q", c)
	from, err := time.Parse(time.RFC3339Nano, f[len(f)-3])
	require.NoError(t, err)
	to, err = time.Parse(time.RFC3339Nano, f[len(f)-1])
	require.NoError(t, err)
	return from, to
}

// childWithOrZero returns the pid of a child of this process whose
// command line mentions s, or 0.
func childWithOrZero(s string) int {
	tasks, _ := filepath.Glob(fmt.Sprintf("/proc/%d/task/*/children", os.Getpid()))
	for _, f := range tasks {
		b, _ := os.ReadFile(f)
		for _, p := range strings.Fields(string(b)) {
			cmd, _ := os.ReadFile("/proc/" + p + "/cmdline")
			if bytes.Contains(cmd, []byte(s)) {
				pid, _ := strconv.Atoi(p)
				return pid
			}
		}
	}
	return 0
}

func childWith(t *testing.T, s string) int {
	t.Helper()
	pid := childWithOrZero(s)
	require.NotZero(t, pid, "no child process mentions %s", s)
	return pid
}

// scrapeValue reads one sample from the daemon's /metrics.
func scrapeValue(t *testing.T, httpAddr, series string) float64 {
	t.Helper()
	resp, err := http.Get("http://" + httpAddr + "/metrics")
	require.NoError(t, err)
	defer resp.Body.Close()
	sc := bufio.NewScanner(resp.Body)
	for sc.Scan() {
		if v, ok := strings.CutPrefix(sc.Text(), series+" "); ok {
			f, err := strconv.ParseFloat(v, 64)
			require.NoError(t, err)
			return f
		}
	}
	return 0
}
