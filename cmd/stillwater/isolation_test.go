package main

import (
	"bytes"
	"context"
	"encoding/binary"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"mime/multipart"
	"net"
	"net/http"
	"net/http/httptest"
	"net/textproto"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/daemon"
	"stillwater/cmd/stillwater/internal/demo"
	"stillwater/cmd/stillwater/internal/tuning"
	"stillwater/vision/refdata"
)

// silentSource listens on loopback, accepts every connection and never
// sends a byte: a camera that is up at the TCP level and hangs at the
// protocol level. It returns host:port.
func silentSource(t *testing.T) string {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	var mu sync.Mutex
	var conns []net.Conn
	go func() {
		for {
			c, err := ln.Accept()
			if err != nil {
				return
			}
			mu.Lock()
			conns = append(conns, c)
			mu.Unlock()
		}
	}()
	t.Cleanup(func() {
		ln.Close()
		mu.Lock()
		defer mu.Unlock()
		for _, c := range conns {
			c.Close()
		}
	})
	return ln.Addr().String()
}

// writerlessPipe makes a named pipe that nobody writes to: opening it for
// reading blocks in the kernel, where no FFmpeg timeout reaches. At the
// end of the test a writer comes and goes, so that an open still blocked
// on it returns.
func writerlessPipe(t *testing.T) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), "camera.pipe")
	require.NoError(t, syscall.Mkfifo(p, 0o600))
	t.Cleanup(func() { releasePipe(p) })
	return p
}

// releasePipe opens and closes the pipe's write end, which frees a reader
// blocked in open(2); it does nothing when no reader waits.
func releasePipe(p string) {
	if f, err := os.OpenFile(p, os.O_WRONLY|syscall.O_NONBLOCK, 0); err == nil {
		time.Sleep(50 * time.Millisecond)
		f.Close()
	}
}

// logBuffer is a goroutine-safe buffer for the daemon's JSON log.
type logBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *logBuffer) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

// all returns every log record, decoded.
func (l *logBuffer) all() []map[string]any {
	l.mu.Lock()
	defer l.mu.Unlock()
	var out []map[string]any
	for _, ln := range strings.Split(l.b.String(), "\n") {
		var rec map[string]any
		if json.Unmarshal([]byte(ln), &rec) == nil {
			out = append(out, rec)
		}
	}
	return out
}

// lines returns the log records whose msg is msg.
func (l *logBuffer) lines(msg string) []map[string]any {
	var out []map[string]any
	for _, rec := range l.all() {
		if rec["msg"] == msg {
			out = append(out, rec)
		}
	}
	return out
}

// recordTime is the time field of a JSON log record.
func recordTime(t *testing.T, rec map[string]any) time.Time {
	t.Helper()
	s, _ := rec["time"].(string)
	at, err := time.Parse(time.RFC3339Nano, s)
	require.NoError(t, err, "log time %q", s)
	return at
}

// startLoggedDaemon is startDaemon with the daemon's JSON log kept at
// debug level, and a stop that reports how long serve took to return
// after its context ended (what SIGTERM does in run). stop gives up after
// limit and reports that as an error.
func startLoggedDaemon(t *testing.T, cfg config.Config, limit time.Duration) (*busLog, *logBuffer, func() (time.Duration, error)) {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	bl := &busLog{}
	lb := &logBuffer{}
	var w io.Writer = lb
	if os.Getenv("STILLWATER_TEST_LOG") != "" {
		w = io.MultiWriter(lb, os.Stderr)
	}
	ready := make(chan [2]string, 1)
	done := make(chan error, 1)
	go func() {
		done <- daemon.Serve(ctx, cfg, daemon.Deps{
			Log:   slog.New(slog.NewJSONHandler(w, &slog.HandlerOptions{Level: slog.LevelDebug})),
			Ready: func(busURL, httpAddr string) { ready <- [2]string{busURL, httpAddr} },
		})
	}()
	select {
	case r := <-ready:
		bl.URL, bl.HTTP = r[0], r[1]
	case err := <-done:
		cancel()
		t.Fatalf("daemon ended before it was ready: %v", err)
	case <-time.After(20 * time.Second):
		cancel()
		t.Fatal("daemon not ready within 20 s")
	}
	nc, err := nats.Connect(bl.URL)
	require.NoError(t, err)
	_, err = nc.Subscribe(cfg.Bus.Prefix+".>", bl.add)
	require.NoError(t, err)
	require.NoError(t, nc.Flush())
	var once sync.Once
	var took time.Duration
	var result error
	stop := func() (time.Duration, error) {
		once.Do(func() {
			t0 := time.Now()
			cancel()
			select {
			case result = <-done:
				took = time.Since(t0)
			case <-time.After(limit):
				took, result = time.Since(t0), context.DeadlineExceeded
			}
			nc.Close()
		})
		return took, result
	}
	t.Cleanup(func() { stop() })
	return bl, lb, stop
}

// firstStart waits for the camera's first target start and returns it with
// its arrival time at a subscriber.
func firstStart(t *testing.T, bl *busLog, camera string, limit time.Duration) (alert.Target, time.Time) {
	t.Helper()
	subj := "stillwater." + camera + ".target"
	require.Eventually(t, func() bool { return len(bl.bySubject(subj)) > 0 }, limit, 20*time.Millisecond,
		"camera %s published no target", camera)
	m := bl.bySubject(subj)[0]
	var tg alert.Target
	require.NoError(t, json.Unmarshal(m.Data, &tg))
	require.Equal(t, "start", tg.Event)
	return tg, m.At
}

// shutdownLimit is how long serve may take to return after its context
// ends: the cameras' stop wait and the bus flush (see serve).
const shutdownLimit = daemon.CameraStopWait + daemon.FlushWait + time.Second

// TestHangingSourcesDoNotHoldUpAHealthyCamera runs a camera playing a
// generated clip in which a child enters the water beside two cameras
// whose open never completes on its own: an RTSP address that accepts the
// connection and never answers, and a named pipe that no one writes to
// (its open(2) blocks in the kernel, beyond any FFmpeg timeout).
//
//   - The healthy camera's target start reaches a subscriber within 1 s
//     of its alarm decision (the message's time field is stamped at the
//     decision). This bound is the requirement itself, so the test checks
//     wall time, with the 20 s of ASTM F2208 (entry to alarm) far off.
//   - Both hanging cameras raise camera_lost within the frame timeout
//     (3 s) plus the watchdog tick, and heartbeat camera_ok=false.
//   - serve returns within the shutdown limit after its context ends.
func TestHangingSourcesDoNotHoldUpAHealthyCamera(t *testing.T) {
	if testing.Short() {
		t.Skip("plays a 20 s clip in real time")
	}
	truth, clip, dir := renderScene(t, "child", 7, tuning.FloatingChild)
	cfg := demo.Config(truth, clip, dir, true)
	cfg.HeartbeatEvery = config.Duration(time.Second)
	silent, pipe := cfg.Cameras[0], cfg.Cameras[0]
	silent.ID, silent.Source, silent.Transport = "silent", "rtsp://"+silentSource(t)+"/pool", "tcp"
	pipe.ID, pipe.Source = "pipe", writerlessPipe(t)
	cfg.Cameras = append(cfg.Cameras, silent, pipe)
	require.NoError(t, cfg.Validate())

	start := time.Now()
	bl, _, stop := startLoggedDaemon(t, cfg, 60*time.Second)
	lost := map[string]time.Duration{}
	for _, id := range []string{"silent", "pipe"} {
		at := waitFault(t, bl, "stillwater."+id+".fault", alert.FaultCameraLost, true, start, 10*time.Second)
		lost[id] = at.Sub(start)
		assert.LessOrEqual(t, lost[id], 3*time.Second+time.Second, "camera_lost for %s", id)
	}
	tg, at := firstStart(t, bl, "demo", 30*time.Second)
	delay := at.Sub(tg.Time)
	for _, id := range []string{"silent", "pipe"} {
		beats := bl.bySubject("stillwater." + id + ".heartbeat")
		require.NotEmpty(t, beats, "camera %s sent no heartbeat (one a second)", id)
		for _, m := range beats {
			var hb alert.Heartbeat
			require.NoError(t, json.Unmarshal(m.Data, &hb))
			assert.False(t, hb.CameraOK, "camera %s delivered no frame yet heartbeats camera_ok=true", id)
		}
	}
	took, err := stop()
	refdata.Report(t, "hanging sources: healthy camera's target start published %.0f ms after its alarm decision (limit 1000 ms); "+
		"camera_lost after %.2f s (silent RTSP) and %.2f s (writerless pipe); serve returned %.2f s after cancel (limit %.0f s)",
		ms(delay), lost["silent"].Seconds(), lost["pipe"].Seconds(), took.Seconds(), shutdownLimit.Seconds())
	assert.LessOrEqual(t, delay, time.Second, "decision to publish")
	require.NoError(t, err, "serve did not return after cancel")
	assert.LessOrEqual(t, took, shutdownLimit)
	assert.Empty(t, bl.bySubject("stillwater.demo.fault"), "the healthy camera reported a fault")
}

func ms(d time.Duration) float64 { return float64(d) / float64(time.Millisecond) }

// aviJPEGs returns the frames of a Motion-JPEG AVI as the JPEG data it
// holds (the movi list's compressed-video chunks, in order).
func aviJPEGs(t *testing.T, path string) [][]byte {
	t.Helper()
	b, err := os.ReadFile(path)
	require.NoError(t, err)
	p := bytes.Index(b, []byte("movi"))
	require.Positive(t, p, "no movi list in %s", path)
	var out [][]byte
	for p += 4; p+8 <= len(b); {
		id, size := string(b[p:p+4]), int(binary.LittleEndian.Uint32(b[p+4:]))
		switch {
		case id == "idx1":
			return out
		case id == "LIST":
			p += 12 // into the list
			continue
		case strings.HasSuffix(id, "dc") && p+8+size <= len(b):
			out = append(out, b[p+8:p+8+size])
		}
		p += 8 + size + size&1
	}
	return out
}

// segmentedMJPEG serves frames as an MJPEG-over-HTTP camera does, but ends
// every response after segment frames (paced at fps), so that the reader
// must reconnect; frames go on where the last response stopped.
func segmentedMJPEG(t *testing.T, frames [][]byte, segment int, fps float64) string {
	t.Helper()
	var mu sync.Mutex
	next := 0
	srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		mw := multipart.NewWriter(w)
		w.Header().Set("Content-Type", "multipart/x-mixed-replace; boundary="+mw.Boundary())
		tick := time.NewTicker(time.Duration(float64(time.Second) / fps))
		defer tick.Stop()
		for i := 0; i < segment; i++ {
			mu.Lock()
			f := frames[next%len(frames)]
			next++
			mu.Unlock()
			h := textproto.MIMEHeader{}
			h.Set("Content-Type", "image/jpeg")
			h.Set("Content-Length", strconv.Itoa(len(f)))
			pw, err := mw.CreatePart(h)
			if err != nil {
				return
			}
			if _, err := pw.Write(f); err != nil {
				return
			}
			w.(http.Flusher).Flush()
			select {
			case <-r.Context().Done():
				return
			case <-tick.C:
			}
		}
		mw.Close()
	}))
	t.Cleanup(srv.Close)
	return srv.URL + "/video"
}

// TestSilentSourcesDoNotStallAReopen runs three cameras whose RTSP
// servers accept and never answer beside a healthy MJPEG-over-HTTP camera
// whose stream ends every 1.5 s, so that it reconnects again and again.
// Each reconnect (from the failed read to the camera being back, the
// 100 ms first backoff included) must not wait for the silent cameras'
// opens: at most 1 s, well under the 3 s frame timeout, so the healthy
// camera never reports camera_lost.
func TestSilentSourcesDoNotStallAReopen(t *testing.T) {
	if testing.Short() {
		t.Skip("runs the daemon for about 15 s")
	}
	truth, clip, dir := renderScene(t, "empty", 7, nil)
	frames := aviJPEGs(t, clip)
	require.NotEmpty(t, frames)
	cfg := demo.Config(truth, clip, dir, false)
	healthy := &cfg.Cameras[0]
	healthy.Source = segmentedMJPEG(t, frames, 15, 10)
	for i := 0; i < 3; i++ {
		c := cfg.Cameras[0]
		c.ID, c.Source, c.Transport = fmt.Sprintf("silent%d", i), "rtsp://"+silentSource(t)+"/pool", "tcp"
		cfg.Cameras = append(cfg.Cameras, c)
	}
	require.NoError(t, cfg.Validate())

	bl, logs, stop := startLoggedDaemon(t, cfg, 60*time.Second)
	// Six reconnects take about 10 s; a stalled camera gets 30 s.
	for end := time.Now().Add(30 * time.Second); len(logs.lines("camera back")) < 6 && time.Now().Before(end); {
		time.Sleep(100 * time.Millisecond)
	}
	_, err := stop()
	require.NoError(t, err)

	var gaps []time.Duration
	var failed time.Time
	for _, rec := range logs.all() {
		if rec["camera"] != "demo" {
			continue
		}
		switch rec["msg"] {
		case "camera read failed; reconnecting":
			failed = recordTime(t, rec)
		case "camera back":
			if !failed.IsZero() {
				gaps = append(gaps, recordTime(t, rec).Sub(failed))
				failed = time.Time{}
			}
		}
	}
	if failed.After(time.Time{}) {
		gaps = append(gaps, time.Since(failed)) // still not back at the end
	}
	require.NotEmpty(t, gaps, "the healthy camera never reconnected")
	slices.Sort(gaps)
	worst, median := gaps[len(gaps)-1], gaps[len(gaps)/2]
	refdata.Report(t, "silent sources: with three RTSP servers that never answer, the healthy camera's %d reconnects took %.0f ms median, %.0f ms worst (limit 1000 ms)",
		len(gaps), ms(median), ms(worst))
	assert.LessOrEqual(t, worst, time.Second)
	assert.GreaterOrEqual(t, len(gaps), 5, "the healthy camera did not keep reconnecting")
	assert.Zero(t, len(bl.bySubject("stillwater.demo.fault")), "the healthy camera reported faults")
	for i := 0; i < 3; i++ {
		assert.NotEmpty(t, bl.bySubject(fmt.Sprintf("stillwater.silent%d.fault", i)), "silent camera %d raised no camera_lost", i)
	}
}

// storedAt returns the bus server's timestamp of the first message on subj
// in its JetStream stream: when the publish reached the server, which
// acknowledges it only after that.
func storedAt(t *testing.T, url, subj string) time.Time {
	t.Helper()
	nc, err := nats.Connect(url)
	require.NoError(t, err)
	defer nc.Close()
	js, err := jetstream.New(nc)
	require.NoError(t, err)
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	name, err := js.StreamNameBySubject(ctx, subj)
	require.NoError(t, err)
	cons, err := js.OrderedConsumer(ctx, name, jetstream.OrderedConsumerConfig{FilterSubjects: []string{subj}})
	require.NoError(t, err)
	msg, err := cons.Next(jetstream.FetchMaxWait(5 * time.Second))
	require.NoError(t, err)
	md, err := msg.Metadata()
	require.NoError(t, err)
	return md.Timestamp
}

// TestTargetPublishedBeforeItsEvidence plays the child clip with evidence
// on and off and measures, for the first target start, the time from the
// alarm decision (the message's time field) to the bus server storing the
// message. With evidence on, the message must be stored before the
// snapshot it names is written, and the delay must not grow with evidence: both stay within the 1 s requirement
// (a daemon-level bound on wall time, generous against the milliseconds
// measured).
func TestTargetPublishedBeforeItsEvidence(t *testing.T) {
	if testing.Short() {
		t.Skip("plays a 20 s clip twice")
	}
	truth, clip, dir := renderScene(t, "child", 7, tuning.FloatingChild)
	delays := map[bool]time.Duration{}
	var written time.Duration
	for _, on := range []bool{false, true} {
		cfg := demo.Config(truth, clip, filepath.Join(dir, fmt.Sprint(on)), false)
		cfg.Evidence.Enabled = &on
		require.NoError(t, cfg.Validate())
		bl, logs, stop := startLoggedDaemon(t, cfg, 60*time.Second)
		tg, _ := firstStart(t, bl, "demo", 60*time.Second)
		stored := storedAt(t, bl.URL, "stillwater.demo.target")
		delays[on] = stored.Sub(tg.Time)
		if on {
			require.NotEmpty(t, tg.Evidence)
			snap := filepath.Join(cfg.DataDir, tg.Evidence)
			// The writer logs the snapshot once it is whole. (The file's
			// modification time would not do: the kernel stamps it from a
			// clock that lags by up to a tick.)
			var kept time.Time
			require.Eventually(t, func() bool {
				for _, rec := range logs.lines("evidence kept") {
					if rec["file"] == filepath.Base(snap) || rec["snapshot"] == filepath.Base(snap) {
						kept = recordTime(t, rec)
						return true
					}
				}
				return false
			}, 10*time.Second, 10*time.Millisecond, "no snapshot %s logged", tg.Evidence)
			written = kept.Sub(stored)
			assert.True(t, stored.Before(kept), "the target was stored %v after its snapshot was written", stored.Sub(kept))
			jpg, err := os.ReadFile(snap)
			require.NoError(t, err)
			assert.True(t, bytes.HasPrefix(jpg, []byte{0xff, 0xd8, 0xff}), "evidence is not a JPEG")
			clipPath := strings.TrimSuffix(snap, ".jpg") + ".avi"
			require.Eventually(t, func() bool { st, err := os.Stat(clipPath); return err == nil && st.Size() > 0 }, 10*time.Second, 50*time.Millisecond)
		} else {
			assert.Empty(t, tg.Evidence)
		}
		_, err := stop()
		require.NoError(t, err)
	}
	refdata.Report(t, "evidence: alarm decision to target stored on the bus %.1f ms with evidence off, %.1f ms with it on; the snapshot was complete %.1f ms after the target was stored",
		ms(delays[false]), ms(delays[true]), ms(written))
	for on, d := range delays {
		assert.LessOrEqual(t, d, time.Second, "evidence on: %v", on)
	}
}
