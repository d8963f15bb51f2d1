// Package decode reads a video stream with FFmpeg's libraries directly,
// without OpenCV's capture in between.
//
// OpenCV 4.6's capture decodes on as many threads as the machine has CPUs,
// with no way to ask for fewer, converts every frame to packed BGR at its
// full size, and holds one process-wide lock across every open. On a 1080p
// H.264 clip it cost 17 ms of CPU a frame with the shrink to 640×360 the
// daemon then made, against 10–11 ms for a Stream (BenchmarkDecode1080p; a
// profile of the OpenCV case put a quarter of it in the kernel, its
// threads' hand-offs, and a fifth in the resize). A Stream decodes on as
// many threads as it is told (one by default: the caller's own), cuts
// every blocking call off at a timeout through FFmpeg's interrupt
// callback, and converts the decoder's planes to packed BGR at the frame's
// size, bit for bit as OpenCV's capture does, or straight to a smaller
// size in the same pass.
//
// Not safe for concurrent use.
package decode

// #cgo pkg-config: libavformat libavcodec libswscale libavutil
// #include <stdlib.h>
// #include "decode.h"
import "C"

import (
	"errors"
	"fmt"
	"image"
	"io"
	"math"
	"sort"
	"strings"
	"time"
	"unsafe"

	"gocv.io/x/gocv"
)

const errLen = 512

// Options tune how a stream is opened and read.
type Options struct {
	// Demuxer holds FFmpeg demuxer options, such as "rtsp_transport":
	// "udp". Keys and values may not contain '=' or a newline.
	Demuxer map[string]string
	// Threads is the decoder's thread count: 0 means 1 (decode on the
	// caller's thread only); a negative count lets FFmpeg choose.
	Threads int
	// SkipDeblock leaves out the codec's in-loop deblocking filter
	// (H.264 and HEVC, the codecs cameras send; MPEG-4 Part 2 and MJPEG
	// have no such filter, from memory). The frames are then not the
	// ones the encoder meant: block edges stay a little sharper, and
	// since later frames are predicted from these, the difference can
	// grow until the next key frame. Decoding costs 14 % less
	// (BenchmarkDecode1080p, vtest.avi at 1080p; 22 % less for ffmpeg on
	// the bench's generated pool clip). For a detector that averages the
	// picture down to cells of several pixels; not for a picture a
	// person is to look at closely.
	SkipDeblock bool
	// OpenTimeout bounds Open, ReadTimeout each Next; 0: no bound.
	OpenTimeout, ReadTimeout time.Duration
	// Name is what errors call the stream; empty: the url as given. Set
	// it when the url holds a password.
	Name string
}

// Info is what the stream says of itself.
type Info struct {
	Size     image.Point
	FPS      float64       // nominal frame rate, 0 when unknown
	Duration time.Duration // 0 when unknown (a live stream)
	Frames   int64         // frames the container declares, 0 when it does not
	Codec    string
}

// Frame is the frame Next decoded.
type Frame struct {
	// PTS is its presentation time from the stream's start time (as
	// OpenCV's CAP_PROP_POS_MSEC counts); HasPTS is false when the
	// stream gave none.
	PTS    time.Duration
	HasPTS bool
	Key    bool // a key frame
}

// Stream is an open video stream.
type Stream struct {
	d       *C.SwDecoder
	name    string // what errors call the stream (Options.Name)
	info    Info
	timeout time.Duration
}

// Open opens url, a file path or a network address such as rtsp://.
func Open(url string, o Options) (*Stream, error) {
	name := o.Name
	if name == "" {
		name = url
	}
	opts, err := demuxerOptions(o.Demuxer)
	if err != nil {
		return nil, fmt.Errorf("decode %s: %w", name, err)
	}
	threads := o.Threads
	switch {
	case threads == 0:
		threads = 1
	case threads < 0:
		threads = 0 // FFmpeg's choice
	}
	cURL, cOpts := C.CString(url), C.CString(opts)
	defer C.free(unsafe.Pointer(cURL))
	defer C.free(unsafe.Pointer(cOpts))
	var buf [errLen]C.char
	skip := C.int(0)
	if o.SkipDeblock {
		skip = 1
	}
	d := C.sw_dec_open(cURL, cOpts, C.int(threads), skip, C.int64_t(o.OpenTimeout.Microseconds()), &buf[0], errLen)
	if d == nil {
		return nil, fmt.Errorf("decode %s: %s", name, C.GoString(&buf[0]))
	}
	var w, h C.int
	var fps, dur C.double
	var frames C.int64_t
	var codec *C.char
	C.sw_dec_info(d, &w, &h, &fps, &dur, &frames, &codec)
	s := &Stream{d: d, name: name, timeout: o.ReadTimeout, info: Info{
		Size: image.Pt(int(w), int(h)), FPS: float64(fps),
		Duration: time.Duration(float64(dur) * float64(time.Second)), Frames: int64(frames), Codec: C.GoString(codec),
	}}
	if s.info.Size.X <= 0 || s.info.Size.Y <= 0 {
		s.Close()
		return nil, fmt.Errorf("decode %s: the video stream gives no frame size", name)
	}
	return s, nil
}

// demuxerOptions renders options as the C side parses them, in key order.
func demuxerOptions(m map[string]string) (string, error) {
	keys := make([]string, 0, len(m))
	for k, v := range m {
		if k == "" || strings.ContainsAny(k, "=\n") || strings.ContainsRune(v, '\n') {
			return "", fmt.Errorf("demuxer option %q=%q: keys must be non-empty and free of '=' and newlines, values free of newlines", k, v)
		}
		keys = append(keys, k)
	}
	sort.Strings(keys)
	var b strings.Builder
	for _, k := range keys {
		fmt.Fprintf(&b, "%s=%s\n", k, m[k])
	}
	return b.String(), nil
}

// Info returns what the stream says of itself.
func (s *Stream) Info() Info { return s.info }

// Errors returns how many packets or frames the decoder found damaged so
// far; they are skipped, not fatal.
func (s *Stream) Errors() int64 { return int64(C.sw_dec_errors(s.d)) }

// Next decodes the next frame; io.EOF at the end of the stream.
func (s *Stream) Next() (Frame, error) {
	if s.d == nil {
		return Frame{}, errors.New("decode: stream closed")
	}
	var buf [errLen]C.char
	switch C.sw_dec_next(s.d, C.int64_t(s.timeout.Microseconds()), &buf[0], errLen) {
	case 1:
	case 0:
		return Frame{}, io.EOF
	default:
		return Frame{}, fmt.Errorf("decode %s: %s", s.name, C.GoString(&buf[0]))
	}
	f := Frame{Key: C.sw_dec_key(s.d) != 0}
	if pts := float64(C.sw_dec_pts(s.d)); !math.IsNaN(pts) {
		f.PTS, f.HasPTS = time.Duration(pts*float64(time.Second)), true
	}
	return f, nil
}

// BGR converts the frame decoded last (kept through a failed Next) to
// packed BGR at size (the frame's own size when size is zero), into dst,
// reallocated only when its size or type differ. At the frame's own size
// the pixels are those of OpenCV's capture; smaller, they are averaged
// over areas, as OpenCV's INTER_AREA does.
func (s *Stream) BGR(dst *gocv.Mat, size image.Point) error {
	if s.d == nil {
		return errors.New("decode: stream closed")
	}
	if size == (image.Point{}) {
		size = s.info.Size
	}
	if size.X <= 0 || size.Y <= 0 {
		return fmt.Errorf("decode %s: output size %v", s.name, size)
	}
	if dst.Cols() != size.X || dst.Rows() != size.Y || dst.Type() != gocv.MatTypeCV8UC3 || !dst.IsContinuous() {
		m := gocv.NewMatWithSize(size.Y, size.X, gocv.MatTypeCV8UC3)
		dst.Close()
		*dst = m
	}
	data, err := dst.DataPtrUint8()
	if err != nil {
		return fmt.Errorf("decode %s: %w", s.name, err)
	}
	var buf [errLen]C.char
	if C.sw_dec_bgr(s.d, (*C.uint8_t)(unsafe.Pointer(&data[0])), C.int(size.X), C.int(size.Y), C.int(dst.Step()), &buf[0], errLen) != 0 {
		return fmt.Errorf("decode %s: convert: %s", s.name, C.GoString(&buf[0]))
	}
	return nil
}

// Planes is the current frame in the decoder's own 8-bit Y, Cb and Cr
// planes, before any conversion. Y holds Size.Y rows of YStep bytes; Cb
// and Cr hold the chroma rows, (Size >> Shift) rounded up, of CStep[i]
// bytes. FullRange is true for the full-range (JPEG) formats, which the
// BGR conversion treats as such; the others are converted as the
// limited-range BT.601 that swscale assumes. The slices are the decoder's
// memory: valid until the next Next or Close, and never to be written.
type Planes struct {
	Y, Cb, Cr      []byte
	YStep          int
	CStep          [2]int
	Size           image.Point
	ShiftX, ShiftY int
	FullRange      bool
}

// ChromaSize is the size of the chroma planes.
func (p Planes) ChromaSize() image.Point {
	return image.Pt((p.Size.X+1<<p.ShiftX-1)>>p.ShiftX, (p.Size.Y+1<<p.ShiftY-1)>>p.ShiftY)
}

// Planes returns the current frame's planes; false when the frame is not
// 8-bit planar YUV (or has no frame yet) or is not of the stream's size,
// when only BGR gives it.
func (s *Stream) Planes() (Planes, bool) {
	if s.d == nil {
		return Planes{}, false
	}
	var c C.SwPlanes
	if C.sw_dec_planes(s.d, &c) == 0 {
		return Planes{}, false
	}
	p := Planes{
		YStep:     int(c.step[0]),
		CStep:     [2]int{int(c.step[1]), int(c.step[2])},
		Size:      image.Pt(int(c.width), int(c.height)),
		ShiftX:    int(c.shift_x),
		ShiftY:    int(c.shift_y),
		FullRange: c.full != 0,
	}
	if p.Size != s.info.Size {
		return Planes{}, false
	}
	ch := p.ChromaSize()
	p.Y = unsafe.Slice((*byte)(unsafe.Pointer(c.data[0])), p.YStep*p.Size.Y)
	p.Cb = unsafe.Slice((*byte)(unsafe.Pointer(c.data[1])), p.CStep[0]*ch.Y)
	p.Cr = unsafe.Slice((*byte)(unsafe.Pointer(c.data[2])), p.CStep[1]*ch.Y)
	return p, true
}

// Ticks is the clock of packet times: 90 000 a second.
const Ticks = C.SW_TICKS

// NoTime marks a packet time the stream did not give.
const NoTime = math.MinInt64

// Packet is one compressed packet of the video stream, as it came.
type Packet struct {
	Data []byte
	// PTS and DTS are its presentation and decoding times in Ticks from
	// the stream's start time, NoTime when absent; Duration is 0 when
	// unknown.
	PTS, DTS, Duration int64
	Key                bool
}

// Packets appends copies of the video packets the latest Next read to
// dst, oldest first, and returns it: one for most frames, several when the
// decoder held frames back, none when it only drained what it held.
func (s *Stream) Packets(dst []Packet) []Packet {
	if s.d == nil {
		return dst
	}
	n := int(C.sw_dec_packets(s.d))
	for i := 0; i < n; i++ {
		var data *C.uint8_t
		var size, key C.int
		var pts, dts, dur C.int64_t
		C.sw_dec_packet(s.d, C.int(i), &data, &size, &pts, &dts, &dur, &key)
		dst = append(dst, Packet{
			Data: C.GoBytes(unsafe.Pointer(data), size),
			PTS:  int64(pts), DTS: int64(dts), Duration: int64(dur), Key: key != 0,
		})
	}
	return dst
}

// Params describe the stream's codec, enough to write its packets into a
// file (see Muxer).
type Params struct {
	CodecID   int    // FFmpeg's codec id
	Codec     string // its name, as Info.Codec
	Size      image.Point
	Extradata []byte // the codec's set-up data (H.264's parameter sets)
	Delay     int    // frames the codec may hold back (B-frames)
}

// Equal reports whether p and q describe the same codec set-up, so that
// packets of one stream can follow the other's in a file.
func (p Params) Equal(q Params) bool {
	return p.CodecID == q.CodecID && p.Size == q.Size && p.Delay == q.Delay && string(p.Extradata) == string(q.Extradata)
}

// Params returns the stream's codec parameters.
func (s *Stream) Params() Params {
	if s.d == nil {
		return Params{}
	}
	var id, n, delay C.int
	var extra *C.uint8_t
	C.sw_dec_params(s.d, &id, &extra, &n, &delay)
	p := Params{CodecID: int(id), Codec: s.info.Codec, Size: s.info.Size, Delay: int(delay)}
	if n > 0 {
		p.Extradata = C.GoBytes(unsafe.Pointer(extra), n)
	}
	return p
}

// Close releases the stream. It is safe to call more than once.
func (s *Stream) Close() error {
	if s.d != nil {
		C.sw_dec_close(s.d)
		s.d = nil
	}
	return nil
}
