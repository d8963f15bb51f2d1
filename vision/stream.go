package vision

import (
	"math"
	"syscall"
	"time"

	"gocv.io/x/gocv"

	"stillwater/vision/decode"
)

// backend is a capture the Camera reads frames from: OpenCV's (capture,
// for V4L2 devices) or a stream decoded with FFmpeg's libraries directly
// (streamCapture, for files and network sources).
type backend interface {
	// read takes and converts the next frame into dst; ok is false at
	// the end of the stream or when no frame came.
	read(dst *gocv.Mat) (ok bool, err error)
	// grab takes the next frame without converting it; retrieve converts
	// the frame last grabbed into dst.
	grab() (ok bool, err error)
	retrieve(dst *gocv.Mat) (ok bool, err error)
	// get returns an OpenCV videoio property (capProp*).
	get(prop int) float64
	Close() error
}

// streamCapture is a backend over decode.Stream. It decodes on the
// camera's own goroutine, one thread, where OpenCV's capture decodes on
// one thread per CPU; on a 1080p H.264 clip it spends about 10 ms of CPU a
// frame, full size, where OpenCV's capture with a shrink to 640×360 spent
// 17 (decode's BenchmarkDecode1080p).
// Frames, their times and the stream's facts are OpenCV's to the bit
// (decode's tests compare them), so nothing downstream changes.
type streamCapture struct {
	s *decode.Stream
	// fd is a descriptor the stream reads from (a named pipe opened
	// here, handed over as pipe:N), closed after it; -1 when none.
	fd  int
	cur decode.Frame
	// copyable: the codec's packets can go into an MP4 clip as they are
	// (see packetRing). keep: a clip may want them (the camera keeps
	// evidence of its own), so each grab copies them into pending, which
	// holds those read since the camera last took them, frames dropped
	// unsearched included. Without keep nothing is copied.
	copyable, keep bool
	params         decode.Params
	pending        []decode.Packet
}

// copyableCodec reports whether a clip keeps the codec's packets as they
// came instead of JPEG pictures of the decoded frames: so for what IP
// cameras send, where encoding a decoded picture again costs far more
// than copying its packet. MJPEG and the rest go the JPEG way.
func copyableCodec(name string) bool {
	switch name {
	case "h264", "hevc", "mpeg4":
		return true
	}
	return false
}

// packets hands over the packets read since the last call and the
// stream's codec parameters; ok is false for a codec whose packets are
// not kept. The slice is valid until the next grab.
func (c *streamCapture) packets() (pk []decode.Packet, p decode.Params, ok bool) {
	if c.s == nil || !c.copyable {
		return nil, decode.Params{}, false
	}
	pk = c.pending
	c.pending = c.pending[:0]
	return pk, c.params, true
}

// openStream opens uri for the Camera. transport is the RTSP transport
// ("tcp", "udp" or "" for FFmpeg's choice); skipDeblock leaves out the
// codec's deblocking filter (decode.Options.SkipDeblock); the timeouts
// bound the open and each read (0: defaultStreamTimeout).
func openStream(uri string, transport string, skipDeblock bool, openTimeout, readTimeout time.Duration) (*streamCapture, error) {
	if openTimeout <= 0 {
		openTimeout = defaultStreamTimeout
	}
	if readTimeout <= 0 {
		readTimeout = defaultStreamTimeout
	}
	// The Camera's errors name the source, redacted; so do these.
	o := decode.Options{SkipDeblock: skipDeblock, OpenTimeout: openTimeout, ReadTimeout: readTimeout, Name: Redact(uri)}
	if transport != "" {
		o.Demuxer = map[string]string{"rtsp_transport": transport}
	}
	s, err := decode.Open(uri, o)
	if err != nil {
		return nil, err
	}
	sc := &streamCapture{s: s, fd: -1, copyable: copyableCodec(s.Info().Codec)}
	if sc.copyable {
		sc.params = s.Params()
	}
	return sc, nil
}

// defaultStreamTimeout bounds a stream's open and reads when the source
// sets no timeout: OpenCV's capture default, which the Camera's open wait
// assumes (see openWait).
const defaultStreamTimeout = 30 * time.Second

func (c *streamCapture) read(dst *gocv.Mat) (bool, error) {
	if ok, err := c.grab(); !ok || err != nil {
		return ok, err
	}
	return c.retrieve(dst)
}

// grab decodes the next frame. A read that fails or times out gives no
// frame, as OpenCV's capture does; the Camera decides what that means
// (the end of a file, damaged media, a live source gone quiet).
func (c *streamCapture) grab() (bool, error) {
	if c.s == nil {
		return false, errCaptureClosed
	}
	f, err := c.s.Next()
	if err != nil {
		return false, nil
	}
	c.cur = f
	if c.copyable && c.keep {
		c.pending = c.s.Packets(c.pending)
	}
	return true, nil
}

func (c *streamCapture) retrieve(dst *gocv.Mat) (bool, error) {
	if c.s == nil {
		return false, errCaptureClosed
	}
	if err := c.s.BGR(dst, c.s.Info().Size); err != nil {
		return false, err
	}
	return true, nil
}

// planes shows the frame last grabbed in the decoder's own planes.
func (c *streamCapture) planes() (decode.Planes, bool) {
	if c.s == nil {
		return decode.Planes{}, false
	}
	return c.s.Planes()
}

// get answers the properties the Camera asks for as OpenCV 4.6's FFmpeg
// capture does: the nominal rate; the declared frame count, else duration
// × rate; the current frame's time in ms from the stream's start, 0 for
// a frame without one.
func (c *streamCapture) get(prop int) float64 {
	if c.s == nil {
		return 0
	}
	in := c.s.Info()
	switch prop {
	case capPropFPS:
		return in.FPS
	case capPropFrameCount:
		if in.Frames > 0 {
			return float64(in.Frames)
		}
		return math.Floor(in.Duration.Seconds()*in.FPS + 0.5)
	case capPropPosMsec:
		if !c.cur.HasPTS {
			return 0
		}
		return float64(c.cur.PTS) / float64(time.Millisecond)
	}
	return 0
}

// Close releases the stream, then the descriptor it read from. It is
// safe to call twice.
func (c *streamCapture) Close() error {
	if c.s != nil {
		c.s.Close()
		c.s = nil
	}
	if c.fd >= 0 {
		syscall.Close(c.fd)
		c.fd = -1
	}
	return nil
}
