package main

import (
	"bytes"
	"context"
	"encoding/json"
	"io"
	"log/slog"
	"net/http"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/daemon"
	"stillwater/cmd/stillwater/internal/demo"
	"stillwater/cmd/stillwater/internal/tuning"
	"stillwater/vision/synth"
)

// busLog collects every message a real subscriber receives, with the
// wall time of arrival.
type busLog struct {
	URL  string // the daemon's bus
	HTTP string // the daemon's HTTP listener, host:port
	mu   sync.Mutex
	msgs []busMsg
}

type busMsg struct {
	Subject string
	At      time.Time
	Data    []byte
}

func (l *busLog) add(m *nats.Msg) {
	l.mu.Lock()
	defer l.mu.Unlock()
	l.msgs = append(l.msgs, busMsg{Subject: m.Subject, At: time.Now(), Data: append([]byte(nil), m.Data...)})
}

func (l *busLog) bySubject(subj string) []busMsg {
	l.mu.Lock()
	defer l.mu.Unlock()
	var out []busMsg
	for _, m := range l.msgs {
		if m.Subject == subj {
			out = append(out, m)
		}
	}
	return out
}

func httpGet(t *testing.T, url string) (int, string) {
	t.Helper()
	c := http.Client{Timeout: 10 * time.Second}
	resp, err := c.Get(url)
	require.NoError(t, err)
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	require.NoError(t, err)
	return resp.StatusCode, string(b)
}

// renderScene returns a named scenario at a seed, after edit (may be nil)
// has changed it, rendered once into the shared render cache (see
// cachedClip), with a fresh directory for the daemon's data.
func renderScene(t *testing.T, name string, seed int64, edit func(*synth.Scene)) (synth.Truth, string, string) {
	t.Helper()
	s, ok := tuning.ScenarioByName(name, seed)
	require.True(t, ok, "scenario %q", name)
	if edit != nil {
		edit(&s)
	}
	truth, clip := cachedClip(t, s)
	return truth, clip, t.TempDir()
}

// cachedClip renders s once into the git-ignored render cache
// (synth.CacheDir, keyed by a hash of the scene and the renderer version)
// and returns its labels and the clip's path. Every test and benchmark
// that needs the same scene shares the one file; the caller must not
// write beside it.
func cachedClip(tb testing.TB, s synth.Scene) (synth.Truth, string) {
	tb.Helper()
	dir, err := synth.CacheDir()
	require.NoError(tb, err)
	clip, _, truth, err := synth.Cached(context.Background(), s, dir)
	require.NoError(tb, err)
	return truth, clip
}

// startDaemon runs serve on cfg in the background with a subscriber on
// every subject; stop ends it and waits.
func startDaemon(t *testing.T, cfg config.Config) (log *busLog, stop func() error) {
	t.Helper()
	return startDaemonWith(t, cfg, nil)
}

// startDaemonWith is startDaemon with the daemon's metrics on reg (nil: a
// registry of its own).
func startDaemonWith(t *testing.T, cfg config.Config, reg *prometheus.Registry) (log *busLog, stop func() error) {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	log = &busLog{}
	ready := make(chan [2]string, 1)
	done := make(chan error, 1)
	go func() {
		var w io.Writer = io.Discard
		if os.Getenv("STILLWATER_TEST_LOG") != "" {
			w = os.Stderr // a daemon's log for a failing test: STILLWATER_TEST_LOG=1
		}
		done <- daemon.Serve(ctx, cfg, daemon.Deps{
			Log:      slog.New(slog.NewTextHandler(w, nil)),
			Registry: reg,
			Ready:    func(busURL, httpAddr string) { ready <- [2]string{busURL, httpAddr} },
		})
	}()
	var url string
	select {
	case r := <-ready:
		url, log.HTTP = r[0], r[1]
	case err := <-done:
		cancel()
		t.Fatalf("daemon ended before it was ready: %v", err)
	case <-time.After(20 * time.Second):
		cancel()
		t.Fatal("daemon not ready within 20 s")
	}
	log.URL = url
	nc, err := nats.Connect(url)
	require.NoError(t, err)
	_, err = nc.Subscribe(cfg.Bus.Prefix+".>", log.add)
	require.NoError(t, err)
	require.NoError(t, nc.Flush())
	var once sync.Once
	var result error
	stop = func() error {
		once.Do(func() {
			cancel()
			select {
			case result = <-done:
			case <-time.After(20 * time.Second):
				buf := make([]byte, 1<<20)
				t.Logf("daemon did not stop; goroutines:\n%s", buf[:runtime.Stack(buf, true)])
				result = context.DeadlineExceeded
			}
			nc.Close()
		})
		return result
	}
	t.Cleanup(func() { stop() })
	return log, stop
}

// TestDeadCameraIsAFaultAndDoesNotStallOthers runs two cameras: one whose
// RTSP address has nothing listening, one playing a generated clip with a
// child. The dead one must raise camera_lost within its frame timeout
// (3 s) plus the watchdog's 200 ms tick; the live one must still raise its
// target. ASTM F2208 allows 20 s from entry to alarm in total; a dead
// camera has to be reported well inside that.
func TestDeadCameraIsAFaultAndDoesNotStallOthers(t *testing.T) {
	if testing.Short() {
		t.Skip("renders a 20 s clip")
	}
	truth, clip, dir := renderScene(t, "child", 7, tuning.FloatingChild)
	cfg := demo.Config(truth, clip, dir, true)
	dead := cfg.Cameras[0]
	dead.ID, dead.Source = "dead", "rtsp://127.0.0.1:9/nothing"
	cfg.Cameras = append(cfg.Cameras, dead)
	require.NoError(t, cfg.Validate())

	start := time.Now()
	log, stop := startDaemon(t, cfg)
	require.Eventually(t, func() bool { return len(log.bySubject("stillwater.dead.fault")) > 0 }, 10*time.Second, 50*time.Millisecond)
	f := log.bySubject("stillwater.dead.fault")[0]
	delay := f.At.Sub(start)
	t.Logf("camera_lost after %.2f s", delay.Seconds())
	var fault alert.Fault
	require.NoError(t, json.Unmarshal(f.Data, &fault))
	assert.Equal(t, alert.FaultCameraLost, fault.Fault)
	assert.True(t, fault.Active)
	assert.Contains(t, fault.Message, "no frame")
	assert.Less(t, delay, 3*time.Second+time.Second)

	// Not ready while an armed camera is dead; the reason names it.
	code, body := httpGet(t, "http://"+log.HTTP+"/readyz")
	assert.Equal(t, http.StatusServiceUnavailable, code)
	assert.Contains(t, body, "camera dead")
	// The live camera's latest annotated frame.
	code, body = httpGet(t, "http://"+log.HTTP+"/cameras/demo/latest.jpg")
	require.Equal(t, http.StatusOK, code, body)
	assert.True(t, strings.HasPrefix(body, "\xff\xd8\xff"), "not a JPEG")
	code, _ = httpGet(t, "http://"+log.HTTP+"/cameras/nosuch/latest.jpg")
	assert.Equal(t, http.StatusNotFound, code)

	// The live camera's clip plays in real time; its child enters at 5 s.
	require.Eventually(t, func() bool { return len(log.bySubject("stillwater.demo.target")) > 0 }, 25*time.Second, 100*time.Millisecond,
		"the working camera raised no target while the other was dead")
	// The alarm's start names its evidence, kept in the data directory.
	var first alert.Target
	require.NoError(t, json.Unmarshal(log.bySubject("stillwater.demo.target")[0].Data, &first))
	require.Equal(t, "start", first.Event)
	require.NotEmpty(t, first.Evidence, "the start target names no evidence")
	// The alarm goes out first; its snapshot is written right after.
	var jpg []byte
	require.Eventually(t, func() bool {
		var err error
		jpg, err = os.ReadFile(filepath.Join(cfg.DataDir, first.Evidence))
		return err == nil && len(jpg) > 0
	}, 5*time.Second, 50*time.Millisecond, "no snapshot %s after the alarm", first.Evidence)
	assert.True(t, bytes.HasPrefix(jpg, []byte{0xff, 0xd8, 0xff}), "evidence is not a JPEG")
	evClip := strings.TrimSuffix(filepath.Join(cfg.DataDir, first.Evidence), ".jpg") + ".avi"
	require.Eventually(t, func() bool { st, err := os.Stat(evClip); return err == nil && st.Size() > 0 }, 5*time.Second, 100*time.Millisecond,
		"no evidence clip beside the snapshot")
	require.NoError(t, stop())
	assert.Empty(t, log.bySubject("stillwater.demo.fault"), "the working camera reported a fault")
}
