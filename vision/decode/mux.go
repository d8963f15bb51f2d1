package decode

// #include <stdlib.h>
// #include "decode.h"
import "C"

import (
	"errors"
	"fmt"
	"unsafe"
)

// Muxer writes a stream's packets into an MP4 file as they came, without
// decoding them: a clip costs the copy of its bytes, and its pictures are
// the camera's own. Not safe for concurrent use.
type Muxer struct {
	m      *C.SwMux
	path   string
	params Params
	n      int
	last   int64 // the latest packet's decoding time
}

// CreateMP4 creates the MP4 file path for packets of a stream with params
// (from Stream.Params); comment, if not empty, goes into its comment tag.
// Each packet's decoding time (its presentation time when it has none)
// must be after the one before; WritePacket refuses a packet whose is not.
func CreateMP4(path string, params Params, comment string) (*Muxer, error) {
	if params.Size.X <= 0 || params.Size.Y <= 0 {
		return nil, fmt.Errorf("mp4 %s: frame size %v", path, params.Size)
	}
	cPath, cComment := C.CString(path), C.CString(comment)
	defer C.free(unsafe.Pointer(cPath))
	defer C.free(unsafe.Pointer(cComment))
	var extra *C.uint8_t
	if len(params.Extradata) > 0 {
		extra = (*C.uint8_t)(C.CBytes(params.Extradata))
		defer C.free(unsafe.Pointer(extra))
	}
	var buf [errLen]C.char
	m := C.sw_mux_open(cPath, C.int(params.CodecID), C.int(params.Size.X), C.int(params.Size.Y), extra, C.int(len(params.Extradata)),
		C.int(params.Delay), cComment, &buf[0], errLen)
	if m == nil {
		return nil, fmt.Errorf("mp4 %s: %s", path, C.GoString(&buf[0]))
	}
	return &Muxer{m: m, path: path, params: params}, nil
}

// WritePacket appends p to the file.
func (w *Muxer) WritePacket(p Packet) error {
	if w.m == nil {
		return errors.New("mp4: closed")
	}
	if len(p.Data) == 0 {
		return fmt.Errorf("mp4 %s: packet %d is empty", w.path, w.n)
	}
	dts := p.DTS
	if dts == NoTime {
		dts = p.PTS
	}
	if dts == NoTime {
		return fmt.Errorf("mp4 %s: packet %d has no time", w.path, w.n)
	}
	if w.n > 0 && dts <= w.last {
		return fmt.Errorf("mp4 %s: packet %d: decoding time %d is not after the previous packet's %d (1/%d s)", w.path, w.n, dts, w.last, Ticks)
	}
	var buf [errLen]C.char
	key := 0
	if p.Key {
		key = 1
	}
	if C.sw_mux_write(w.m, (*C.uint8_t)(unsafe.Pointer(&p.Data[0])), C.int(len(p.Data)), C.int64_t(p.PTS), C.int64_t(p.DTS),
		C.int64_t(p.Duration), C.int(key), &buf[0], errLen) != 0 {
		return fmt.Errorf("mp4 %s: packet %d: %s", w.path, w.n, C.GoString(&buf[0]))
	}
	w.n++
	w.last = dts
	return nil
}

// Packets returns how many packets were written.
func (w *Muxer) Packets() int { return w.n }

// Close writes the file's index and closes it. It is safe to call more
// than once; only the first call can fail.
func (w *Muxer) Close() error {
	if w.m == nil {
		return nil
	}
	var buf [errLen]C.char
	r := C.sw_mux_close(w.m, &buf[0], errLen)
	w.m = nil
	if r != 0 {
		return fmt.Errorf("mp4 %s: %s", w.path, C.GoString(&buf[0]))
	}
	return nil
}
