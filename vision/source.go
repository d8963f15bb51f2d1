package vision

import (
	"bufio"
	"context"
	"crypto/tls"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"net/url"
	"os"
	"strings"
	"sync"
	"syscall"
	"time"

	"gocv.io/x/gocv"
)

// Why opens are fenced in here: an open that hangs must not hold up the
// camera's goroutine, and a source that hangs every open must not cost a
// blocked thread per retry. Files and network sources are decoded with
// FFmpeg's libraries directly (see streamCapture), whose every blocking
// call is cut off at the source's timeouts; V4L2 devices go through
// OpenCV's capture, which waits on the device. Three things keep a source
// from blocking beyond that: a named pipe is opened here without blocking
// and handed to FFmpeg as a descriptor; a network source must answer a
// request of its own protocol within the open timeout before the decoder
// sees it; and every open runs on a goroutine of its own that is abandoned
// after its wait (see OpenGate). (OpenCV 4.6's FFmpeg capture, used for
// these sources before, also held one process-wide lock across every open,
// so one hanging open held up every other camera's: measured here, a file
// open waited 2.8 s behind an RTSP open to a server that never answered.
// The direct decoder takes no such lock.) Evidence clips do not use FFmpeg
// at all (see avi.go).

// Errors of an open that did not complete.
var (
	// ErrOpenTimeout means the backend's open did not return within its
	// wait; it was abandoned and is freed when it returns.
	ErrOpenTimeout = errors.New("open did not return in time")
	// ErrOpenStuck means an earlier, abandoned open of the same source
	// has still not returned, so no other is started.
	ErrOpenStuck = errors.New("an earlier open of this source has not returned")
	// ErrNoAnswer means a network source accepted no request or did not
	// answer it within the open timeout.
	ErrNoAnswer = errors.New("source does not answer")
)

// OpenGate runs one source's opens, each on its own goroutine, and waits
// for each at most its time limit. An open that outlives it is abandoned:
// the caller gets ErrOpenTimeout at once and holds nothing, and what the
// open yields when it finally returns is closed. Until it has returned,
// every later open through the same gate fails at once with ErrOpenStuck,
// so that a source whose open never returns costs one blocked thread, not
// one per retry. A Camera made without a gate uses its own; give cameras
// of the same source across reconnects and re-creations the same gate.
// The zero value is ready; safe for concurrent use.
type OpenGate struct {
	mu    sync.Mutex
	busy  chan struct{} // closed when the open under way returns; nil when none
	since time.Time     // start of the open under way
}

// openResult is what an open yields: a capture and its first frame, owned
// by whoever receives the result.
type openResult struct {
	cp    backend
	frame gocv.Mat
	err   error
}

func (r openResult) close() {
	if r.cp != nil {
		r.cp.Close()
		r.frame.Close()
	}
}

// run runs open on its own goroutine and waits at most wait for it.
func (g *OpenGate) run(wait time.Duration, open func() openResult) openResult {
	g.mu.Lock()
	if g.busy != nil {
		select {
		case <-g.busy:
		default:
			since := g.since
			g.mu.Unlock()
			return openResult{err: fmt.Errorf("%w (blocked for %v)", ErrOpenStuck, time.Since(since).Round(time.Second))}
		}
	}
	done := make(chan struct{})
	g.busy, g.since = done, time.Now()
	g.mu.Unlock()

	res := make(chan openResult, 1)
	go func() {
		defer close(done)
		res <- open()
	}()
	t := time.NewTimer(wait)
	defer t.Stop()
	select {
	case r := <-res:
		// The goroutine marks the gate free just after handing r over:
		// wait for that, or an open right after this one (a reconnect)
		// would be refused as stuck.
		<-done
		return r
	case <-t.C:
		go func() { (<-res).close() }()
		return openResult{err: fmt.Errorf("%w within %v", ErrOpenTimeout, wait)}
	}
}

// Stuck reports whether an abandoned open is still blocked, and since when.
func (g *OpenGate) Stuck() (bool, time.Time) {
	g.mu.Lock()
	defer g.mu.Unlock()
	if g.busy == nil {
		return false, time.Time{}
	}
	select {
	case <-g.busy:
		return false, time.Time{}
	default:
		return true, g.since
	}
}

// backendSource is what the backend is handed for one open.
type backendSource struct {
	uri string
	fd  int // a named pipe opened here, -1 when none
}

// prepare checks the source before the backend sees it and returns what to
// hand the backend. It never blocks longer than the open timeout.
func (c *Camera) prepare() (backendSource, error) {
	switch c.kind {
	case kindV4L2:
		if _, err := os.Stat(c.sc.URI); err != nil {
			return backendSource{}, err
		}
		return backendSource{uri: c.sc.URI, fd: -1}, nil
	case kindFile:
		st, err := os.Stat(c.sc.URI)
		if err != nil {
			return backendSource{}, err
		}
		if st.Mode()&os.ModeNamedPipe == 0 {
			return backendSource{uri: c.sc.URI, fd: -1}, nil
		}
		// open(2) of a named pipe for reading blocks in the kernel until a
		// writer comes; opened non-blocking it returns at once, and FFmpeg
		// reads the descriptor (pipe:N) without opening anything. Reads
		// stay non-blocking too: FFmpeg retries them under its read timeout.
		fd, err := syscall.Open(c.sc.URI, syscall.O_RDONLY|syscall.O_NONBLOCK|syscall.O_CLOEXEC, 0)
		if err != nil {
			return backendSource{}, fmt.Errorf("named pipe: %w", err)
		}
		return backendSource{uri: fmt.Sprintf("pipe:%d", fd), fd: fd}, nil
	default:
		if err := probe(c.sc.URI, c.kind, c.probeTimeout()); err != nil {
			return backendSource{}, err
		}
		return backendSource{uri: c.sc.URI, fd: -1}, nil
	}
}

// probeTimeout bounds the protocol check of a network source.
func (c *Camera) probeTimeout() time.Duration {
	if c.sc.OpenTimeout > 0 {
		return c.sc.OpenTimeout
	}
	return 10 * time.Second
}

// openWait is how long an open (with its first frame) may take before it
// is abandoned: the backend's own open and read timeouts, and a margin.
func (c *Camera) openWait() time.Duration {
	o, r := c.sc.OpenTimeout, c.sc.ReadTimeout
	if o <= 0 || c.kind == kindV4L2 {
		o = defaultStreamTimeout
	}
	if r <= 0 || c.kind == kindV4L2 {
		r = defaultStreamTimeout
	}
	return o + r + 2*time.Second
}

// probe checks that a network source answers a request of its protocol
// within timeout: an RTSP OPTIONS, an HTTP GET whose response headers are
// read. Any answer will do (401 too: the camera is alive and FFmpeg will
// authenticate); a server that accepts the connection and says nothing is
// refused here, before it can hold the backend's open lock. The request
// carries no credentials.
func probe(uri string, kind sourceKind, timeout time.Duration) error {
	u, err := url.Parse(uri)
	if err != nil {
		return fmt.Errorf("source URL: %w", err)
	}
	u.User = nil
	ctx, cancel := context.WithTimeout(context.Background(), timeout)
	defer cancel()
	if kind == kindHTTP {
		err = probeHTTP(ctx, u)
	} else {
		err = probeRTSP(ctx, u)
	}
	if err != nil {
		return fmt.Errorf("%w within %v: %v", ErrNoAnswer, timeout, err)
	}
	return nil
}

func probeHTTP(ctx context.Context, u *url.URL) error {
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, u.String(), nil)
	if err != nil {
		return fmt.Errorf("source URL: %w", err)
	}
	// A liveness check only: FFmpeg does not verify camera certificates
	// either (most are self-signed), and no credential is sent.
	tr := &http.Transport{DisableKeepAlives: true, TLSClientConfig: &tls.Config{InsecureSkipVerify: true}} //nolint:gosec
	defer tr.CloseIdleConnections()
	resp, err := (&http.Client{Transport: tr}).Do(req)
	if err != nil {
		return fmt.Errorf("HTTP GET: %w", scrub(err))
	}
	resp.Body.Close()
	return nil
}

func probeRTSP(ctx context.Context, u *url.URL) error {
	host := u.Host
	if u.Port() == "" {
		port := "554"
		if u.Scheme == "rtsps" {
			port = "322"
		}
		host = net.JoinHostPort(u.Hostname(), port)
	}
	var d net.Dialer
	conn, err := d.DialContext(ctx, "tcp", host)
	if err != nil {
		return err
	}
	defer conn.Close()
	if dl, ok := ctx.Deadline(); ok {
		conn.SetDeadline(dl)
	}
	if u.Scheme == "rtsps" {
		tc := tls.Client(conn, &tls.Config{InsecureSkipVerify: true, ServerName: u.Hostname()}) //nolint:gosec // liveness only, as FFmpeg
		conn = tc
	}
	if _, err := fmt.Fprintf(conn, "OPTIONS %s RTSP/1.0\r\nCSeq: 1\r\nUser-Agent: stillwater\r\n\r\n", u.String()); err != nil {
		return fmt.Errorf("RTSP OPTIONS: %w", err)
	}
	line, err := bufio.NewReader(io.LimitReader(conn, 512)).ReadString('\n')
	if err != nil {
		return fmt.Errorf("RTSP OPTIONS: %w", err)
	}
	if !strings.HasPrefix(line, "RTSP/") {
		return fmt.Errorf("RTSP OPTIONS: the reply starts %q", strings.TrimSpace(line))
	}
	return nil
}

// scrub drops the URL from a net/http client error: the caller's error
// already names the source, redacted.
func scrub(err error) error {
	var ue *url.Error
	if errors.As(err, &ue) {
		return ue.Err
	}
	return err
}
