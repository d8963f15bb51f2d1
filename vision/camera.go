package vision

import (
	"errors"
	"fmt"
	"image"
	"io"
	"math"
	"net/url"
	"strings"
	"syscall"
	"time"

	"gocv.io/x/gocv"

	"stillwater/vision/decode"
)

// SourceConfig says where frames come from.
type SourceConfig struct {
	// URI is one of: an rtsp:// URL, an http:// or https:// MJPEG URL, a
	// V4L2 device path (/dev/video0, /dev/v4l/by-id/...), or a video file
	// path.
	URI string
	// Transport is "tcp" or "udp" for RTSP; empty lets FFmpeg choose (UDP
	// first, then TCP).
	Transport string
	// OpenTimeout and ReadTimeout bound the decoder's blocking calls
	// (RTSP, HTTP, files); zero gives 30 s, as OpenCV's capture waited.
	// V4L2 devices use the driver's own wait instead.
	OpenTimeout, ReadTimeout time.Duration
	// Loop plays a file source again from the start at its end instead of
	// returning io.EOF; media time keeps increasing across passes.
	Loop bool
	// Realtime plays a file source at its own frame rate, as a live camera
	// delivers it: Next waits for each frame's time, and frames more than
	// MaxLag late are dropped unsearched (see pace.go).
	Realtime bool
	// MaxLag bounds how far behind a live (RTSP or HTTP) stream frames are
	// searched: when the frame taken is older than this against the newest
	// one, frames are dropped unsearched until it is not (see backlog.go).
	// Zero selects 500 ms; negative never drops.
	MaxLag time.Duration
	// Gate runs the opens of this source (see OpenGate); nil gives the
	// Camera a gate of its own. Share one across OpenCamera calls for the
	// same source so that an abandoned open is not started again.
	Gate *OpenGate
	// Deblock decodes H.264 and HEVC streams with the codec's in-loop
	// deblocking filter, as a player does. Left false, the filter is
	// skipped (decode.Options.SkipDeblock): it smooths block edges a
	// detector averaging the picture into cells does not see, and costs
	// 14–22 % of the decoding (see decode.Options.SkipDeblock). Copied packets (the pre-roll and the
	// alarm clips) are untouched either way; snapshots and the live view
	// show the frames as decoded.
	Deblock bool
}

// Result is what one frame yielded.
type Result struct {
	Index  int           // frame number from 0, counted across loops and reconnects
	Media  time.Duration // media time of the frame from the first one
	Size   image.Point   // source frame size, px
	Blobs  []Blob
	Stats  FrameStats
	Health HealthStats // image statistics for the camera health monitor
	// Rejoining is true for a frame that was only probed, not searched:
	// after a reconnect, or when a live source is first opened, the
	// picture is not trusted until it is whole again (see rejoin.go).
	Rejoining bool
	// Rejoined is set on the frame that ends the probing: RejoinKept,
	// RejoinRebuilt or RejoinForced.
	Rejoined string
}

// CaptureStats counts what happened at the capture since OpenCamera.
type CaptureStats struct {
	// FramesRead is the number of frames decoded, the first one read by
	// OpenCamera or Reconnect included.
	FramesRead int64
	// EmptyReads is the number of reads of a live source that gave no frame
	// (a timeout, a dropped stream).
	EmptyReads int64
	// DecodeErrors is the number of reads of a file that failed before the
	// frame count the file declares (damaged or truncated media).
	DecodeErrors int64
	// Loops is the number of times a looped file started again.
	Loops int64
	// Reconnects is the number of successful Reconnect calls.
	Reconnects int64
	// Dropped is the number of frames of a live source, or of a file
	// played in real time, decoded and dropped unsearched to catch up
	// (see SourceConfig.MaxLag).
	Dropped int64
}

// ReconnectInfo says what Reconnect found.
type ReconnectInfo struct {
	// Size is the frame size after reconnecting, px.
	Size image.Point
	// Rebuilt is true when the frame size changed: the detector was rebuilt
	// with its mask polygons scaled to the new size, and the background
	// model starts from scratch. Pixel calibrations made at OldSize no longer
	// apply.
	Rebuilt bool
	// OldSize is the frame size before reconnecting, px.
	OldSize image.Point
}

// Errors Next and Reconnect return; callers branch on them with errors.Is.
var (
	// ErrNoFrame means a live source gave no frame within the read timeout.
	ErrNoFrame = errors.New("camera gave no frame")
	// ErrDamagedMedia means a file stopped decoding before its declared end.
	ErrDamagedMedia = errors.New("damaged media")
	// ErrDisconnected means the capture is closed after a failed Reconnect;
	// call Reconnect again.
	ErrDisconnected = errors.New("camera disconnected")
)

type sourceKind int

const (
	kindFile sourceKind = iota
	kindRTSP
	kindHTTP
	kindV4L2
)

func kindOf(uri string) sourceKind {
	switch {
	case strings.HasPrefix(uri, "rtsp://"), strings.HasPrefix(uri, "rtsps://"):
		return kindRTSP
	case strings.HasPrefix(uri, "http://"), strings.HasPrefix(uri, "https://"):
		return kindHTTP
	case strings.HasPrefix(uri, "/dev/video"), strings.HasPrefix(uri, "/dev/v4l/"):
		return kindV4L2
	default:
		return kindFile
	}
}

// Camera reads frames from a source and runs a Detector over them. It owns
// the capture and every Mat; Close frees them. Not safe for concurrent use.
type Camera struct {
	sc      SourceConfig
	dc      DetectorConfig
	kind    sourceKind
	cap     backend
	det     frameDetector
	frame   gocv.Mat // latest full-resolution frame in BGR (when planar, once converted)
	scratch gocv.Mat // read target; swapped with frame on success, so a failed read keeps the last frame
	primed  bool     // frame holds an unprocessed first frame
	// planar is true when the latest frame is in the decoder's planes
	// (view): the picture checks and the detector read them, and the
	// frame is converted to BGR into frame only when something needs it
	// whole (see bgr), after which converted is set. bgrOnly turns this
	// off.
	planar    bool
	converted bool
	view      decode.Planes
	bgrOnly   bool
	fps       float64
	declared  int // frames the file declares, 0 when unknown
	index     int
	passBase  int // index of the first frame of the current file pass
	// passOffset is the media time a looped file's current pass starts at.
	passOffset time.Duration
	started    time.Time
	media      time.Duration // media time of the latest frame
	stats      CaptureStats
	health     healthProbe
	ev         *evidence
	rejoin     *rejoin // non-nil while frames are only probed
	lag        backlog
	gate       *OpenGate
	closed     bool
	// captured is when the latest frame was taken (see Captured); pace
	// times a file played in real time.
	captured time.Time
	pace     pace
	clock    *StageClock // nil unless timed (SetStageClock)
}

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

// maxDecodeRetries is how many failed reads in a row a file may give before
// its declared end until Next reports it as damaged.
const maxDecodeRetries = 3

// OpenCamera opens the source, reads its first frame to learn the frame
// size and sets up the detector for it.
func OpenCamera(sc SourceConfig, dc DetectorConfig) (*Camera, error) {
	red := Redact(sc.URI)
	if sc.Transport != "" && sc.Transport != "tcp" && sc.Transport != "udp" {
		return nil, fmt.Errorf("open camera %q: transport %q: want tcp, udp or empty", red, sc.Transport)
	}
	cam := &Camera{sc: sc, dc: dc, kind: kindOf(sc.URI), frame: gocv.NewMat(), scratch: gocv.NewMat(), started: time.Now(), gate: sc.Gate}
	if cam.gate == nil {
		cam.gate = &OpenGate{}
	}
	if err := cam.open(); err != nil {
		cam.Close()
		return nil, fmt.Errorf("open camera %q: %w", red, err)
	}
	if dc.MeanVar.FPS == 0 {
		dc.MeanVar.FPS = cam.fps
	}
	det, err := newFrameDetector(dc, cam.frameSize())
	if err != nil {
		cam.Close()
		return nil, fmt.Errorf("open camera %q: %w", red, err)
	}
	cam.det = det
	cam.health.watch(dc.Mask)
	if cam.kind == kindRTSP || cam.kind == kindHTTP {
		cam.rejoin = &rejoin{}
	}
	return cam, nil
}

// open opens the capture and reads the first frame into c.frame. The
// open runs through the camera's gate (see OpenGate): it returns after at
// most openWait whatever the backend does, holding nothing.
func (c *Camera) open() error {
	if stuck, since := c.gate.Stuck(); stuck {
		return fmt.Errorf("%w (blocked for %v)", ErrOpenStuck, time.Since(since).Round(time.Second))
	}
	src, err := c.prepare()
	if err != nil {
		return err
	}
	keep := c.keepsPackets()
	r := c.gate.run(c.openWait(), func() openResult {
		cp, err := c.openBackend(src)
		if err != nil {
			if src.fd >= 0 {
				syscall.Close(src.fd)
			}
			return openResult{err: err}
		}
		// Set before the first read, so that its packets are kept too.
		if sc, ok := cp.(*streamCapture); ok {
			sc.keep = keep
		}
		m := gocv.NewMat()
		ok, err := cp.read(&m)
		if err == nil && (!ok || m.Empty()) {
			err = errors.New("no first frame")
		}
		if err != nil {
			m.Close()
			cp.Close()
			return openResult{err: err}
		}
		return openResult{cp: cp, frame: m}
	})
	if r.err != nil {
		if errors.Is(r.err, ErrOpenStuck) && src.fd >= 0 {
			syscall.Close(src.fd) // refused before the open ran
		}
		return r.err
	}
	cp := r.cp
	c.frame.Close()
	c.frame = r.frame
	c.planar = false
	c.cap = cp
	c.primed = true
	c.stats.FramesRead++
	c.fps = cp.get(capPropFPS)
	if c.fps <= 0 || c.fps > 240 {
		c.fps = 0
	}
	c.declared = 0
	if c.kind == kindFile {
		if n := cp.get(capPropFrameCount); n > 0 && n < 1e9 {
			c.declared = int(n)
		}
	}
	return nil
}

// openBackend opens the source handed over by prepare: a V4L2 device
// through OpenCV's capture, anything else as a stream decoded directly
// (see streamCapture). Once open, the backend owns src.fd and closes it.
func (c *Camera) openBackend(src backendSource) (backend, error) {
	if c.kind == kindV4L2 {
		// OpenCV's V4L2 backend takes no open-time timeouts; it waits on
		// the device itself.
		cp, err := openCapture(src.uri, capV4L2, 0, 0)
		if err != nil {
			return nil, err
		}
		cp.fd = src.fd
		return cp, nil
	}
	s, err := openStream(src.uri, c.sc.Transport, !c.sc.Deblock, c.sc.OpenTimeout, c.sc.ReadTimeout)
	if err != nil {
		return nil, err
	}
	s.fd = src.fd
	return s, nil
}

func (c *Camera) frameSize() image.Point { return image.Pt(c.frame.Cols(), c.frame.Rows()) }

// FPS returns the source's nominal frame rate, or 0 when it does not say.
func (c *Camera) FPS() float64 { return c.fps }

// Size returns the source frame size in pixels.
func (c *Camera) Size() image.Point { return c.det.srcSize() }

// Stats returns the capture counters.
func (c *Camera) Stats() CaptureStats { return c.stats }

// Next reads and processes the next frame. hold are source-pixel boxes
// whose pixels must not be learned into the background. It blocks for at
// most about ReadTimeout on a live source. At the end of a file that does
// not loop it returns io.EOF; a file that stops decoding before its
// declared end gives an error wrapping ErrDamagedMedia; a live source that
// gives no frame gives one wrapping ErrNoFrame, after which the caller
// decides when to Reconnect.
func (c *Camera) Next(hold []image.Rectangle) (Result, error) {
	if c.closed {
		return Result{}, errCaptureClosed
	}
	if c.cap == nil {
		return Result{}, ErrDisconnected
	}
	c.clock.start()
	if err := c.advance(); err != nil {
		return Result{}, err
	}
	c.clock.lap(StageDecode)
	r := Result{Index: c.index, Size: c.det.srcSize(), Media: c.mediaTime()}
	c.index++
	c.media = r.Media
	if c.planar {
		h, err := c.health.measurePlanes(c.view, r.Media)
		if err != nil {
			return r, fmt.Errorf("frame %d: %w", r.Index, err)
		}
		r.Health = h
	} else {
		r.Health = c.health.measure(c.frame, r.Media)
	}
	c.clock.lap(StageChecks)
	var (
		pkts     []decode.Packet
		params   decode.Params
		copyable bool
	)
	if sc, ok := c.cap.(*streamCapture); ok {
		pkts, params, copyable = sc.packets()
	}
	if c.ev != nil {
		if err := c.ev.add(r.Size, c.bgr, r.Media, pkts, params, copyable); err != nil {
			return r, fmt.Errorf("frame %d: %w", r.Index, err)
		}
	}
	if c.rejoin != nil {
		return c.probe(r)
	}
	var (
		blobs []Blob
		st    FrameStats
		err   error
	)
	if pd, ok := c.det.(planeDetector); ok && c.planar {
		blobs, st, err = pd.DetectPlanes(c.view, hold)
	} else {
		frame, cerr := c.bgr()
		if cerr != nil {
			return r, fmt.Errorf("frame %d: %w", r.Index, cerr)
		}
		blobs, st, err = c.det.Detect(frame, hold)
	}
	if err != nil {
		return r, fmt.Errorf("frame %d: %w", r.Index, err)
	}
	r.Blobs, r.Stats = blobs, st
	return r, nil
}

// probe probes the frame while the picture after a (re)connect is not
// trusted yet, and ends the probing when it is.
func (c *Camera) probe(r Result) (Result, error) {
	r.Rejoining = true
	var (
		p   probeStats
		err error
	)
	if pd, ok := c.det.(planeDetector); ok && c.planar {
		p, err = pd.probePlanes(c.view)
	} else {
		var frame gocv.Mat
		if frame, err = c.bgr(); err == nil {
			p, err = c.det.probe(frame)
		}
	}
	if err != nil {
		return r, fmt.Errorf("frame %d: %w", r.Index, err)
	}
	out := c.rejoin.step(r.Media, p)
	if out == "" {
		return r, nil
	}
	if out != RejoinKept {
		if err := c.det.reset(); err != nil {
			return r, fmt.Errorf("frame %d: %w", r.Index, err)
		}
	} else if err := c.det.resume(); err != nil {
		return r, fmt.Errorf("frame %d: %w", r.Index, err)
	}
	c.rejoin = nil
	r.Rejoined = out
	return r, nil
}

// mediaTime returns the media time of the frame just read. A file's comes
// from the frame's own timestamp (files with uneven frame spacing exist,
// such as the opencv-doc tree.avi), offset by the passes already played; a
// live source's is the wall time since opening.
func (c *Camera) mediaTime() time.Duration {
	if c.kind != kindFile {
		return time.Since(c.started)
	}
	ms := c.cap.get(capPropPosMsec)
	var t time.Duration
	switch {
	case ms >= 0 && !math.IsNaN(ms) && !math.IsInf(ms, 0):
		t = time.Duration(math.Round(ms*1000)) * time.Microsecond
	case c.fps > 0:
		t = time.Duration(math.Round(float64(c.index-c.passBase) / c.fps * float64(time.Second)))
	}
	t += c.passOffset
	// Never step back: a stream whose timestamps repeat still moves on.
	if c.index > 0 && t <= c.media {
		t = c.media + time.Millisecond
	}
	return t
}

// frameInterval is the nominal time between frames, 100 ms when unknown.
func (c *Camera) frameInterval() time.Duration {
	if c.fps > 0 {
		return time.Duration(math.Round(float64(time.Second) / c.fps))
	}
	return 100 * time.Millisecond
}

// declaredDuration is the length of the file by its header.
func (c *Camera) declaredDuration() time.Duration {
	return time.Duration(math.Round(float64(c.declared) / c.fps * float64(time.Second)))
}

// advance puts the next frame into c.frame and notes when it was taken.
func (c *Camera) advance() error {
	if c.kind == kindFile && c.sc.Realtime {
		return c.advancePaced()
	}
	live, primed := c.kind == kindRTSP || c.kind == kindHTTP, c.primed
	err := c.advanceFrame()
	if err == nil && (primed || !live) { // advanceLive notes its own
		c.captured = time.Now()
	}
	return err
}

// advanceFrame puts the next frame into c.frame.
func (c *Camera) advanceFrame() error {
	if c.primed {
		c.primed = false
		return nil
	}
	if c.kind == kindRTSP || c.kind == kindHTTP {
		return c.advanceLive()
	}
	for tries := 0; ; tries++ {
		ok, err := c.cap.grab()
		if err != nil {
			return err
		}
		if ok {
			if ok, err = c.take(); err != nil {
				return err
			}
		}
		if ok {
			c.stats.FramesRead++
			return nil
		}
		if c.kind != kindFile {
			c.stats.EmptyReads++
			return ErrNoFrame
		}
		// Compare timestamps, not frame counts: a file with sparse frames
		// (tree.avi declares 444 and holds 68 spread over its 29.6 s) still
		// ends at its declared duration.
		played := c.media - c.passOffset
		if c.index == c.passBase {
			played = 0
		}
		if c.declared > 0 && c.fps > 0 && played+3*c.frameInterval() < c.declaredDuration() {
			// The file says it has more frames: a damaged packet or a
			// truncated file. Try a few more reads before giving up.
			c.stats.DecodeErrors++
			if tries < maxDecodeRetries {
				continue
			}
			return fmt.Errorf("%w: no frame decodes after %v of the %v the file declares (frame %d of %d)",
				ErrDamagedMedia, played.Round(time.Millisecond), c.declaredDuration().Round(time.Millisecond), c.index-c.passBase, c.declared)
		}
		if !c.sc.Loop {
			return io.EOF
		}
		return c.rewind()
	}
}

// advanceLive takes a live source's next frame into c.frame, dropping
// frames while the one taken lags the stream by more than MaxLag.
func (c *Camera) advanceLive() error {
	maxLag := c.sc.MaxLag
	if maxLag == 0 {
		maxLag = defaultMaxLag
	}
	grab := func() (grabbed, error) {
		t0 := time.Now()
		ok, err := c.cap.grab()
		if err != nil {
			return grabbed{}, err
		}
		if !ok {
			c.stats.EmptyReads++
			return grabbed{}, ErrNoFrame
		}
		c.stats.FramesRead++
		stream := c.cap.get(capPropPosMsec)
		if math.IsNaN(stream) || math.IsInf(stream, 0) {
			stream = 0
		}
		return grabbed{wall: time.Since(c.started), stream: time.Duration(stream * float64(time.Millisecond)), took: time.Since(t0)}, nil
	}
	var last grabbed
	dropped, err := c.lag.read(func() (grabbed, error) { g, err := grab(); last = g; return g, err }, maxLag)
	c.stats.Dropped += int64(dropped)
	if err != nil {
		return err
	}
	c.captured = c.started.Add(last.wall - c.lag.behind(last))
	ok, err := c.take()
	if err != nil {
		return err
	}
	if !ok {
		c.stats.EmptyReads++
		return ErrNoFrame
	}
	return nil
}

// planeSource is a backend that can show the frame it grabbed in the
// decoder's own planes.
type planeSource interface {
	planes() (decode.Planes, bool)
}

// planeDetector is a detector that reads a frame's planes.
type planeDetector interface {
	DetectPlanes(p decode.Planes, hold []image.Rectangle) ([]Blob, FrameStats, error)
	probePlanes(p decode.Planes) (probeStats, error)
}

// take makes the frame just grabbed the latest: left in the decoder's
// planes when the backend shows them and the detector reads them, else
// converted into frame (the previous frame stays when that fails).
func (c *Camera) take() (bool, error) {
	if ps, ok := c.cap.(planeSource); ok && !c.bgrOnly {
		if _, ok := c.det.(planeDetector); ok {
			if v, ok := ps.planes(); ok {
				c.view, c.planar, c.converted = v, true, false
				return true, nil
			}
		}
	}
	ok, err := c.cap.retrieve(&c.scratch)
	if err != nil || !ok || c.scratch.Empty() {
		return false, err
	}
	c.frame, c.scratch = c.scratch, c.frame
	c.planar = false
	return true, nil
}

// bgr returns the latest frame in BGR, converting it first when it is
// only in the decoder's planes. The planes stay the frame the detector
// reads: the BGR conversion is made for the evidence and the checks that
// need a whole frame, never fed to the detector in their place.
func (c *Camera) bgr() (gocv.Mat, error) {
	if c.planar && !c.converted {
		ok, err := c.cap.retrieve(&c.scratch)
		if err != nil {
			return c.frame, fmt.Errorf("convert frame: %w", err)
		}
		if !ok || c.scratch.Empty() {
			return c.frame, errors.New("convert frame: no frame")
		}
		c.frame, c.scratch = c.scratch, c.frame
		c.converted = true
	}
	return c.frame, nil
}

// closeCapture closes the capture, converting first a latest frame that
// is only in its decoder's planes, so that it outlives the decoder.
func (c *Camera) closeCapture() {
	if c.cap == nil {
		return
	}
	if c.planar {
		c.bgr() // on failure the frame before stays
		c.planar = false
	}
	c.cap.Close()
	c.cap = nil
}

// rewind reopens a looped file at its first frame.
func (c *Camera) rewind() error {
	if c.index == c.passBase {
		return fmt.Errorf("loop %s: the file gave no frames", c.sc.URI)
	}
	c.closeCapture()
	if err := c.open(); err != nil {
		return fmt.Errorf("loop %s: %w", c.sc.URI, err)
	}
	if oldSize := c.det.srcSize(); c.frameSize() != oldSize {
		return fmt.Errorf("loop %s: frame size changed from %v to %v", c.sc.URI, oldSize, c.frameSize())
	}
	c.primed = false
	c.passBase = c.index
	c.passOffset = c.media + c.frameInterval()
	c.stats.Loops++
	return nil
}

// Reconnect closes the capture and opens the source again, keeping the
// detector and its learned background when the frame size is unchanged so
// that a camera coming back needs no relearning. When the size changed the
// detector is rebuilt (see ReconnectInfo) and any clip being recorded is
// finished. On failure the camera stays disconnected: Next returns
// ErrDisconnected until a later Reconnect succeeds. Media time and frame
// numbering continue.
func (c *Camera) Reconnect() (ReconnectInfo, error) {
	if c.closed {
		return ReconnectInfo{}, errCaptureClosed
	}
	info := ReconnectInfo{OldSize: c.det.srcSize()}
	c.closeCapture()
	red := Redact(c.sc.URI)
	if err := c.open(); err != nil {
		return info, fmt.Errorf("reconnect camera %q: %w", red, err)
	}
	info.Size = c.frameSize()
	c.passBase = c.index
	c.passOffset = c.media + c.frameInterval()
	c.health.reset()
	c.stats.Reconnects++
	c.rejoin = &rejoin{}
	c.lag.reset()
	if info.Size == info.OldSize {
		return info, nil
	}
	dc := c.dc
	dc.Mask = scalePoly(dc.Mask, info.OldSize, info.Size)
	dc.Exclude = make([][]Point, len(c.dc.Exclude))
	for i, ex := range c.dc.Exclude {
		dc.Exclude[i] = scalePoly(ex, info.OldSize, info.Size)
	}
	det, err := newFrameDetector(dc, info.Size)
	if err != nil {
		c.closeCapture()
		return info, fmt.Errorf("reconnect camera %q: %w", red, err)
	}
	c.det.Close()
	c.det, c.dc = det, dc
	c.SetStageClock(c.clock) // the new detector keeps the timing
	info.Rebuilt = true
	if c.ev != nil {
		if err := c.ev.resize(); err != nil {
			return info, fmt.Errorf("reconnect camera %q: %w", red, err)
		}
	}
	return info, nil
}

func scalePoly(pts []Point, from, to image.Point) []Point {
	if len(pts) == 0 {
		return nil
	}
	sx, sy := float64(to.X)/float64(from.X), float64(to.Y)/float64(from.Y)
	out := make([]Point, len(pts))
	for i, p := range pts {
		out[i] = Point{p.X * sx, p.Y * sy}
	}
	return out
}

// Close finishes any clip being recorded and frees the capture, the
// detector and the frames. Safe to call twice; the first error is returned.
func (c *Camera) Close() error {
	if c.closed {
		return nil
	}
	c.closed = true
	var err error
	if c.ev != nil {
		err = c.ev.Close()
	}
	if c.det != nil {
		c.det.Close()
	}
	c.health.Close()
	c.planar = false
	c.frame.Close()
	c.scratch.Close()
	if c.cap != nil {
		c.cap.Close()
	}
	return err
}
