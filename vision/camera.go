package vision

import (
	"errors"
	"fmt"
	"image"
	"io"
	"net/url"
	"os"
	"strings"
	"sync"
	"time"

	"gocv.io/x/gocv"
)

// SourceConfig says where frames come from.
type SourceConfig struct {
	// URI is a file path or an rtsp://, http:// URL.
	URI string
	// Transport is "tcp" or "udp" for RTSP; empty lets OpenCV choose.
	Transport string
	// OpenTimeout and ReadTimeout bound the backend's blocking calls; zero
	// keeps OpenCV's default (30 s).
	OpenTimeout, ReadTimeout time.Duration
}

// Result is what one frame yielded.
type Result struct {
	Index int           // frame number from 0
	Media time.Duration // media time of the frame from the first one
	Size  image.Point   // source frame size, px
	Blobs []Blob
	Stats FrameStats
}

// Camera reads frames from a source and runs a Detector over them. It owns
// the capture and every Mat; Close frees them. Not safe for concurrent use.
type Camera struct {
	cap     *capture
	det     *Detector
	frame   gocv.Mat
	primed  bool // frame holds an unprocessed first frame
	fps     float64
	index   int
	isFile  bool
	started time.Time
	closed  bool
}

// envMu serialises changes to OpenCV's FFmpeg options variable, which the
// backend reads from the process environment at open time.
var envMu sync.Mutex

// Redact returns uri with any password replaced, for logs and errors.
func Redact(uri string) string {
	u, err := url.Parse(uri)
	if err != nil || u.User == nil {
		return uri
	}
	if _, ok := u.User.Password(); ok {
		u.User = url.UserPassword(u.User.Username(), "xxxxx")
	}
	return u.String()
}

// OpenCamera opens the source, reads its first frame to learn the frame
// size and sets up the detector for it.
func OpenCamera(sc SourceConfig, dc DetectorConfig) (*Camera, error) {
	red := Redact(sc.URI)
	isFile := !strings.Contains(sc.URI, "://")
	if isFile {
		if _, err := os.Stat(sc.URI); err != nil {
			return nil, fmt.Errorf("open camera %q: %w", red, err)
		}
	}
	api := 0
	envMu.Lock()
	if strings.HasPrefix(sc.URI, "rtsp://") {
		api = capFFmpeg
		opts := ""
		if sc.Transport != "" {
			opts = "rtsp_transport;" + sc.Transport
		}
		os.Setenv("OPENCV_FFMPEG_CAPTURE_OPTIONS", opts)
	}
	c, err := openCapture(sc.URI, api, int(sc.OpenTimeout/time.Millisecond), int(sc.ReadTimeout/time.Millisecond))
	envMu.Unlock()
	if err != nil {
		return nil, fmt.Errorf("open camera %q: %w", red, err)
	}
	cam := &Camera{cap: c, frame: gocv.NewMat(), isFile: isFile, started: time.Now()}
	ok, err := c.read(&cam.frame)
	if err == nil && (!ok || cam.frame.Empty()) {
		err = errors.New("no first frame")
	}
	if err != nil {
		cam.Close()
		return nil, fmt.Errorf("open camera %q: %w", red, err)
	}
	cam.primed = true
	cam.fps = c.get(capPropFPS)
	if cam.fps <= 0 || cam.fps > 240 {
		cam.fps = 0
	}
	det, err := NewDetector(dc, image.Pt(cam.frame.Cols(), cam.frame.Rows()))
	if err != nil {
		cam.Close()
		return nil, fmt.Errorf("open camera %q: %w", red, err)
	}
	cam.det = det
	return cam, nil
}

// FPS returns the source's nominal frame rate, or 0 when it does not say.
func (c *Camera) FPS() float64 { return c.fps }

// Size returns the source frame size in pixels.
func (c *Camera) Size() image.Point { return c.det.src }

// Next reads and processes the next frame. hold are source-pixel boxes
// whose pixels must not be learned into the background. At the end of a
// file it returns io.EOF.
func (c *Camera) Next(hold []image.Rectangle) (Result, error) {
	if c.closed {
		return Result{}, errCaptureClosed
	}
	if c.primed {
		c.primed = false
	} else {
		ok, err := c.cap.read(&c.frame)
		if err != nil {
			return Result{}, err
		}
		if !ok || c.frame.Empty() {
			if c.isFile {
				return Result{}, io.EOF
			}
			return Result{}, errors.New("camera gave no frame")
		}
	}
	r := Result{Index: c.index, Size: c.det.src}
	switch {
	case c.fps > 0 && c.isFile:
		r.Media = time.Duration(float64(c.index) / c.fps * float64(time.Second))
	default:
		r.Media = time.Since(c.started)
	}
	c.index++
	blobs, st, err := c.det.Detect(c.frame, hold)
	if err != nil {
		return r, fmt.Errorf("frame %d: %w", r.Index, err)
	}
	r.Blobs, r.Stats = blobs, st
	return r, nil
}

// Close frees the capture, the detector and the frame. Safe to call twice.
func (c *Camera) Close() error {
	if c.closed {
		return nil
	}
	c.closed = true
	if c.det != nil {
		c.det.Close()
	}
	c.frame.Close()
	return c.cap.Close()
}
