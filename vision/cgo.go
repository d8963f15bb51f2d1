package vision

// #cgo pkg-config: opencv4
// #cgo CXXFLAGS: -std=c++11
// #cgo LDFLAGS: -ldl -ljpeg
// #include <stdlib.h>
// #include "shim.h"
import "C"

import (
	"errors"
	"fmt"
	"image"
	"syscall"
	"unsafe"

	"gocv.io/x/gocv"

	"stillwater/vision/decode"
)

const errBufLen = 512

// background is a background subtractor owned by this package, so that each
// apply can carry its own learning rate (the pinned binding's Apply cannot).
type background struct {
	p C.SwBackground
}

const (
	bgMOG2 = 0
	bgKNN  = 1
)

func newBackground(kind, history int, threshold float64, shadows bool) *background {
	s := 0
	if shadows {
		s = 1
	}
	return &background{p: C.sw_bg_new(C.int(kind), C.int(history), C.double(threshold), C.int(s))}
}

// apply updates the model with img at learning rate lr (negative: OpenCV's
// automatic rate, 0: no learning) and writes the foreground mask to fg.
func (b *background) apply(img gocv.Mat, fg *gocv.Mat, lr float64) error {
	var buf [errBufLen]C.char
	if C.sw_bg_apply(b.p, unsafe.Pointer(img.Ptr()), unsafe.Pointer(fg.Ptr()), C.double(lr), &buf[0], errBufLen) != 0 {
		return fmt.Errorf("background apply: %s", C.GoString(&buf[0]))
	}
	return nil
}

// image writes the model's current background estimate to dst.
func (b *background) image(dst *gocv.Mat) error {
	var buf [errBufLen]C.char
	if C.sw_bg_background(b.p, unsafe.Pointer(dst.Ptr()), &buf[0], errBufLen) != 0 {
		return fmt.Errorf("background image: %s", C.GoString(&buf[0]))
	}
	return nil
}

// Close frees the model. It is safe to call twice.
func (b *background) Close() error {
	if b.p != nil {
		C.sw_bg_close(b.p)
		b.p = nil
	}
	return nil
}

// capture is a video capture opened with open-time timeouts.
type capture struct {
	p C.SwCapture
	// fd is a descriptor the backend reads from (a named pipe opened
	// here, handed over as pipe:N), closed after the capture; -1 when none.
	fd int
}

// OpenCV videoio property ids (opencv2/videoio.hpp).
const (
	capPropFPS        = 5
	capPropFrameCount = 7
	capPropPosMsec    = 0
	capFFmpeg         = 1900
	capV4L2           = 200
)

var errCaptureClosed = errors.New("capture closed")

// openCapture opens uri with the backend api. It blocks for as long as the
// backend does: callers go through an OpenGate.
func openCapture(uri string, api int, openMs, readMs int) (*capture, error) {
	cs := C.CString(uri)
	defer C.free(unsafe.Pointer(cs))
	var buf [errBufLen]C.char
	p := C.sw_cap_open(cs, C.int(api), C.int(openMs), C.int(readMs), &buf[0], errBufLen)
	if p == nil {
		return nil, errors.New(C.GoString(&buf[0]))
	}
	return &capture{p: p, fd: -1}, nil
}

// read grabs and decodes the next frame into dst. ok is false at the end of
// the stream or when the backend gave no frame.
func (c *capture) read(dst *gocv.Mat) (ok bool, err error) {
	if c.p == nil {
		return false, errCaptureClosed
	}
	var buf [errBufLen]C.char
	return capResult(C.sw_cap_read(c.p, unsafe.Pointer(dst.Ptr()), &buf[0], errBufLen), &buf, "read frame")
}

// grab takes the next frame, decoded but not converted (see retrieve).
func (c *capture) grab() (ok bool, err error) {
	if c.p == nil {
		return false, errCaptureClosed
	}
	var buf [errBufLen]C.char
	return capResult(C.sw_cap_grab(c.p, &buf[0], errBufLen), &buf, "grab frame")
}

// retrieve converts the frame last grabbed into dst.
func (c *capture) retrieve(dst *gocv.Mat) (ok bool, err error) {
	if c.p == nil {
		return false, errCaptureClosed
	}
	var buf [errBufLen]C.char
	return capResult(C.sw_cap_retrieve(c.p, unsafe.Pointer(dst.Ptr()), &buf[0], errBufLen), &buf, "retrieve frame")
}

// capResult reads the shim's capture return code: 1 a frame, 0 none, -1
// an OpenCV exception whose message is in buf.
func capResult(rc C.int, buf *[errBufLen]C.char, what string) (bool, error) {
	switch rc {
	case 1:
		return true, nil
	case 0:
		return false, nil
	default:
		return false, fmt.Errorf("%s: %s", what, C.GoString(&buf[0]))
	}
}

func (c *capture) get(prop int) float64 {
	if c.p == nil {
		return 0
	}
	return float64(C.sw_cap_get(c.p, C.int(prop)))
}

// Close releases the capture, then the descriptor it read from. It is
// safe to call twice.
func (c *capture) Close() error {
	if c.p != nil {
		C.sw_cap_close(c.p)
		c.p = nil
	}
	if c.fd >= 0 {
		syscall.Close(c.fd)
		c.fd = -1
	}
	return nil
}

// encodeJPEG encodes an 8-bit grey or BGR Mat as a baseline JPEG of the
// given quality (1–100) through libjpeg directly (see sw_jpeg_encode).
func encodeJPEG(m gocv.Mat, quality int) ([]byte, error) {
	var out *C.uchar
	var n C.ulong
	var buf [errBufLen]C.char
	if C.sw_jpeg_encode(unsafe.Pointer(m.Ptr()), C.int(quality), &out, &n, &buf[0], errBufLen) != 0 {
		return nil, errors.New(C.GoString(&buf[0]))
	}
	defer C.sw_jpeg_free(out)
	if n == 0 {
		return nil, errors.New("encode jpeg: empty result")
	}
	return C.GoBytes(unsafe.Pointer(out), C.int(n)), nil
}

// areaShrink averages src over blocks of f × f pixels into dst: OpenCV's
// INTER_AREA resize for a whole factor, faster (see sw_area_shrink).
func areaShrink(src gocv.Mat, f int, dst *gocv.Mat) error {
	var buf [errBufLen]C.char
	if C.sw_area_shrink(unsafe.Pointer(src.Ptr()), C.int(f), unsafe.Pointer(dst.Ptr()), &buf[0], errBufLen) != 0 {
		return errors.New(C.GoString(&buf[0]))
	}
	return nil
}

// planeGrey writes into dst the grey picture of p's Y plane averaged down
// to size (see sw_plane_grey).
func planeGrey(p decode.Planes, size image.Point, dst *gocv.Mat) error {
	var buf [errBufLen]C.char
	if C.sw_plane_grey((*C.uchar)(unsafe.Pointer(&p.Y[0])), C.int(p.YStep), C.int(p.Size.X), C.int(p.Size.Y), C.int(size.X), C.int(size.Y), cBool(p.FullRange), unsafe.Pointer(dst.Ptr()), &buf[0], errBufLen) != 0 {
		return errors.New(C.GoString(&buf[0]))
	}
	return nil
}

// fixedMaps makes OpenCV's fixed-point remap maps m1, m2 from float maps
// (see sw_fixed_maps).
func fixedMaps(mapX, mapY gocv.Mat, m1, m2 *gocv.Mat) error {
	var buf [errBufLen]C.char
	if C.sw_fixed_maps(unsafe.Pointer(mapX.Ptr()), unsafe.Pointer(mapY.Ptr()), unsafe.Pointer(m1.Ptr()), unsafe.Pointer(m2.Ptr()), &buf[0], errBufLen) != 0 {
		return errors.New(C.GoString(&buf[0]))
	}
	return nil
}

// yuvRemap remaps p's planes onto the maps' grid and converts the result
// to BGR in dst (see sw_yuv_remap): the maps are fixed-point pairs (see
// fixedMaps); gy, gcb, gcr are scratch.
func yuvRemap(p decode.Planes, mapX, mapY, cmapX, cmapY gocv.Mat, gy, gcb, gcr, dst *gocv.Mat) error {
	var buf [errBufLen]C.char
	if C.sw_yuv_remap((*C.uchar)(unsafe.Pointer(&p.Y[0])), C.int(p.YStep), (*C.uchar)(unsafe.Pointer(&p.Cb[0])), C.int(p.CStep[0]), (*C.uchar)(unsafe.Pointer(&p.Cr[0])), C.int(p.CStep[1]),
		C.int(p.Size.X), C.int(p.Size.Y), C.int(p.ShiftX), C.int(p.ShiftY), cBool(p.FullRange),
		unsafe.Pointer(mapX.Ptr()), unsafe.Pointer(mapY.Ptr()), unsafe.Pointer(cmapX.Ptr()), unsafe.Pointer(cmapY.Ptr()),
		unsafe.Pointer(gy.Ptr()), unsafe.Pointer(gcb.Ptr()), unsafe.Pointer(gcr.Ptr()), unsafe.Pointer(dst.Ptr()), &buf[0], errBufLen) != 0 {
		return errors.New(C.GoString(&buf[0]))
	}
	return nil
}

func cBool(b bool) C.int {
	if b {
		return 1
	}
	return 0
}
