package vision

import (
	"bufio"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"gocv.io/x/gocv"
	"golang.org/x/sync/errgroup"

	"stillwater/vision/rtsptest"
)

// silentListener accepts connections on loopback and never answers.
func silentListener(t *testing.T) string {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	done := make(chan struct{})
	go func() {
		var conns []net.Conn
		defer func() {
			for _, c := range conns {
				c.Close()
			}
			close(done)
		}()
		for {
			c, err := ln.Accept()
			if err != nil {
				return
			}
			conns = append(conns, c)
		}
	}()
	t.Cleanup(func() { ln.Close(); <-done })
	return ln.Addr().String()
}

// answeringListener answers the first line of every connection with
// reply and closes it.
func answeringListener(t *testing.T, reply string) string {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	require.NoError(t, err)
	go func() {
		for {
			c, err := ln.Accept()
			if err != nil {
				return
			}
			go func() {
				defer c.Close()
				bufio.NewReader(c).ReadString('\n')
				io.WriteString(c, reply)
			}()
		}
	}()
	t.Cleanup(func() { ln.Close() })
	return ln.Addr().String()
}

func mkfifo(t *testing.T) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), "cam.pipe")
	require.NoError(t, syscall.Mkfifo(p, 0o600))
	return p
}

// TestProbe: a network source must answer a request of its own protocol
// before the video backend is handed it. Any answer will do (a camera
// asking for credentials is alive); silence and a foreign protocol are
// refused within the timeout, and the refusal never shows a password.
func TestProbe(t *testing.T) {
	silent := silentListener(t)
	rtspAuth := answeringListener(t, "RTSP/1.0 401 Unauthorized\r\nCSeq: 1\r\n\r\n")
	notRTSP := answeringListener(t, "SSH-2.0-OpenSSH_9.2\r\n")
	httpAuth := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		assert.Empty(t, r.Header.Get("Authorization"), "the probe sent a credential")
		http.Error(w, "who are you", http.StatusUnauthorized)
	}))
	defer httpAuth.Close()
	const timeout = 300 * time.Millisecond
	tests := []struct {
		name, uri string
		ok        bool
	}{
		{"rtsp silent", "rtsp://viewer:secret@" + silent + "/pool", false},
		{"http silent", "http://viewer:secret@" + silent + "/video", false},
		{"rtsp nothing listening", "rtsp://127.0.0.1:9/pool", false},
		{"rtsp asks for credentials", "rtsp://viewer:secret@" + rtspAuth + "/pool", true},
		{"not rtsp", "rtsp://" + notRTSP + "/pool", false},
		{"http asks for credentials", strings.Replace(httpAuth.URL, "http://", "http://viewer:secret@", 1) + "/video", true},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t0 := time.Now()
			err := probe(tc.uri, kindOf(tc.uri), timeout)
			took := time.Since(t0)
			if tc.ok {
				require.NoError(t, err)
				return
			}
			require.ErrorIs(t, err, ErrNoAnswer)
			assert.NotContains(t, err.Error(), "secret")
			// Bounded by the timeout (and a scheduling margin), never by the
			// server.
			assert.Less(t, took, timeout+time.Second)
		})
	}
}

// TestSilentSourceNeverReachesTheBackend: OpenCamera on a server that
// accepts and never answers fails within its open timeout and leaves
// nothing for the backend: a file opened right after opens at once.
func TestSilentSourceNeverReachesTheBackend(t *testing.T) {
	src := smallClip(t, 1)
	silent := silentListener(t)
	for _, uri := range []string{"rtsp://" + silent + "/pool", "http://" + silent + "/video"} {
		t0 := time.Now()
		_, err := OpenCamera(SourceConfig{URI: uri, Transport: "", OpenTimeout: 500 * time.Millisecond, ReadTimeout: 500 * time.Millisecond}, DetectorConfig{})
		took := time.Since(t0)
		require.ErrorIs(t, err, ErrNoAnswer, uri)
		assert.Less(t, took, 2*time.Second, uri)
	}
	t0 := time.Now()
	cam, err := OpenCamera(SourceConfig{URI: src, OpenTimeout: time.Second, ReadTimeout: time.Second}, DetectorConfig{ProcessWidth: 160})
	require.NoError(t, err)
	cam.Close()
	report(t, "isolation: a file opened %v after two refused silent sources", time.Since(t0).Round(time.Millisecond))
}

// TestNamedPipeSource: a named pipe is opened without blocking and read
// as a descriptor. With no writer the open fails at once (open(2) of the
// path would block in the kernel, holding OpenCV's open lock); with a
// writer playing a clip into it, its frames are read.
func TestNamedPipeSource(t *testing.T) {
	pipe := mkfifo(t)
	t0 := time.Now()
	_, err := OpenCamera(SourceConfig{URI: pipe, OpenTimeout: time.Second, ReadTimeout: time.Second}, DetectorConfig{})
	require.Error(t, err)
	assert.Contains(t, err.Error(), pipe)
	assert.Less(t, time.Since(t0), 2*time.Second)

	src := smallClip(t, 2)
	writerDone := make(chan error, 1)
	go func() {
		w, err := os.OpenFile(pipe, os.O_WRONLY, 0)
		if err != nil {
			writerDone <- err
			return
		}
		defer w.Close()
		f, err := os.Open(src)
		if err != nil {
			writerDone <- err
			return
		}
		defer f.Close()
		_, err = io.Copy(w, f)
		writerDone <- err
	}()
	// The writer's open blocks until a reader holds the pipe; hold it
	// from here until the camera has opened it too.
	hold, err := os.OpenFile(pipe, os.O_RDONLY|syscall.O_NONBLOCK, 0)
	require.NoError(t, err)
	time.Sleep(100 * time.Millisecond)
	cam, err := OpenCamera(SourceConfig{URI: pipe, OpenTimeout: 2 * time.Second, ReadTimeout: 2 * time.Second}, DetectorConfig{ProcessWidth: 160})
	hold.Close()
	require.NoError(t, err)
	defer cam.Close()
	n := 0
	for ; n < 100; n++ {
		if _, err := cam.Next(nil); err != nil {
			break
		}
	}
	require.NoError(t, <-writerDone)
	// The clip has 20 frames; a pipe cannot seek, so they are read as
	// they come, and every one arrives.
	assert.Equal(t, 20, n)
	report(t, "isolation: named pipe without writer refused at once; %d frames read through a pipe with one", n)
}

// TestBlockedOpenCVOpenHoldsUpNoCamera: OpenCV 4.6's FFmpeg capture holds
// one process-wide lock across every open, and an open of a named pipe by
// path waits in the kernel for a writer while holding it. Cameras no
// longer open files and network sources through that capture (see
// streamCapture), so with the lock held this way a healthy file still
// opens at once.
func TestBlockedOpenCVOpenHoldsUpNoCamera(t *testing.T) {
	src := smallClip(t, 1)
	pipe := mkfifo(t)
	blocked := make(chan struct{})
	go func() {
		defer close(blocked)
		cp, err := openCapture(pipe, capFFmpeg, 1000, 1000)
		if err == nil {
			cp.Close()
		}
	}()
	defer func() {
		if w, err := os.OpenFile(pipe, os.O_WRONLY|syscall.O_NONBLOCK, 0); err == nil {
			w.Close()
		}
		<-blocked
	}()
	time.Sleep(200 * time.Millisecond)
	select {
	case <-blocked:
		t.Fatal("the OpenCV open of the pipe returned: the lock is not held, nothing is tested")
	default:
	}
	t0 := time.Now()
	cam, err := OpenCamera(SourceConfig{URI: src, OpenTimeout: 200 * time.Millisecond, ReadTimeout: 200 * time.Millisecond}, DetectorConfig{ProcessWidth: 160})
	took := time.Since(t0)
	require.NoError(t, err)
	cam.Close()
	assert.Less(t, took, time.Second)
	report(t, "isolation: with OpenCV's open lock held by a blocked open, a file camera opened in %v", took.Round(time.Millisecond))
}

// TestOpenGateAbandonsABlockedOpen: an open that outlives its wait is
// abandoned (ErrOpenTimeout after the wait), a second open through the
// same gate is refused at once while it is blocked (ErrOpenStuck), and
// what the abandoned open yields when it returns is closed: no Mat is
// left, and the gate is free again.
func TestOpenGateAbandonsABlockedOpen(t *testing.T) {
	mats0 := matsOpen()
	gate := &OpenGate{}
	unblock := make(chan struct{})
	t0 := time.Now()
	r := gate.run(100*time.Millisecond, func() openResult {
		<-unblock
		return openResult{cp: &streamCapture{fd: -1}, frame: gocv.NewMat()}
	})
	require.ErrorIs(t, r.err, ErrOpenTimeout)
	assert.Less(t, time.Since(t0), time.Second)
	stuck, _ := gate.Stuck()
	assert.True(t, stuck)

	t1 := time.Now()
	ran := false
	r = gate.run(time.Minute, func() openResult { ran = true; return openResult{} })
	require.ErrorIs(t, r.err, ErrOpenStuck)
	assert.False(t, ran)
	assert.Less(t, time.Since(t1), time.Second, "the second open waited")

	close(unblock)
	require.Eventually(t, func() bool { s, _ := gate.Stuck(); return !s }, 5*time.Second, 10*time.Millisecond)
	require.Eventually(t, func() bool { return matsOpen() == mats0 }, 5*time.Second, 10*time.Millisecond, "the abandoned open's Mat was not closed")
	r = gate.run(time.Second, func() openResult { return openResult{err: io.EOF} })
	assert.ErrorIs(t, r.err, io.EOF, "the gate runs opens again")
}

// TestRTSPTransportPerCamera: the loopback relay serves RTP over UDP only,
// so a camera set to udp opens and one set to tcp does not, whichever
// opened before: each open reads its own camera's transport.
func TestRTSPTransportPerCamera(t *testing.T) {
	if testing.Short() {
		t.Skip("starts an RTSP relay")
	}
	srv := rtsptest.Start(t, smallClip(t, 4), "pool")
	for _, tc := range []struct {
		transport string
		ok        bool
	}{{"udp", true}, {"tcp", false}, {"udp", true}} {
		cam, err := OpenCamera(SourceConfig{URI: srv.URL(), Transport: tc.transport, OpenTimeout: 4 * time.Second, ReadTimeout: 2 * time.Second}, DetectorConfig{ProcessWidth: 160})
		if tc.ok {
			require.NoError(t, err, tc.transport)
			cam.Close()
			continue
		}
		require.Error(t, err, tc.transport)
		assert.False(t, errors.Is(err, ErrNoAnswer), "the relay answers; the backend refused the transport")
	}
}

// TestOpenGateFreeOnceAnOpenReturns: an open that returned in time leaves
// the gate free at once, so a reconnect right after it is not refused as
// stuck. (The gate used to be marked free by the open's goroutine only
// after it had handed over the result, and a reconnect could slip in
// between: "blocked for 0s".)
func TestOpenGateFreeOnceAnOpenReturns(t *testing.T) {
	failed := errors.New("no such source")
	// Several gates at once, so that the scheduler moves goroutines
	// between threads and the window, if there is one, opens.
	var g errgroup.Group
	for k := 0; k < 8; k++ {
		g.Go(func() error {
			gate := &OpenGate{}
			for i := 0; i < 20000; i++ {
				if r := gate.run(time.Minute, func() openResult { return openResult{err: failed} }); !errors.Is(r.err, failed) {
					return fmt.Errorf("open %d: %v", i, r.err)
				}
				if stuck, _ := gate.Stuck(); stuck {
					return fmt.Errorf("open %d returned, yet the gate is busy", i)
				}
			}
			return nil
		})
	}
	require.NoError(t, g.Wait())
}
