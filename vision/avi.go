package vision

import (
	"bufio"
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"os"
)

// aviWriter writes Motion-JPEG AVI files (AVI 1.0 RIFF, one video stream,
// every frame a key frame, an idx1 index) from JPEG data as it is, without
// decoding or encoding anything, and without the video backend: OpenCV's
// FFmpeg writer takes the same process-wide lock as every capture open
// (see source.go), so a camera hanging in its open would hold up every
// clip. Players and OpenCV read the result (evidence_test.go reads it back
// with OpenCV's FFmpeg backend).
type aviWriter struct {
	f      *os.File
	w      *bufio.Writer
	pos    int64 // bytes written so far
	index  []aviChunk
	maxLen uint32
}

type aviChunk struct {
	offset uint32 // from the movi list's fourcc
	size   uint32
}

// Offsets in the fixed header that close fills in.
const (
	aviRiffSize    = 4
	aviTotalFrames = 48
	aviSuggested   = 60
	aviStreamLen   = 140
	aviStreamBuf   = 144
	aviMoviSize    = 216
	aviMoviFourCC  = 220
	aviHeaderLen   = 224
	aviFrameMax    = 1 << 30 // AVI 1.0 keeps the whole RIFF under 1 GiB here
	aviKeyFrame    = 0x10    // AVIIF_KEYFRAME
	aviHasIndex    = 0x10    // AVIF_HASINDEX
	aviFrameRateDn = 1000    // dwScale: fps in thousandths
)

// createAVI creates path for frames of width×height pixels at fps.
func createAVI(path string, width, height int, fps float64) (*aviWriter, error) {
	if width <= 0 || height <= 0 || fps <= 0 || math.IsNaN(fps) || math.IsInf(fps, 0) {
		return nil, fmt.Errorf("create clip %s: frame size %d×%d at %v fps", path, width, height, fps)
	}
	f, err := os.OpenFile(path, os.O_WRONLY|os.O_CREATE|os.O_TRUNC, 0o640)
	if err != nil {
		return nil, fmt.Errorf("create clip: %w", err)
	}
	a := &aviWriter{f: f, w: bufio.NewWriterSize(f, 256<<10)}
	h := make([]byte, aviHeaderLen)
	le := binary.LittleEndian
	put4 := func(off int, s string) { copy(h[off:off+4], s) }
	put32 := func(off int, v uint32) { le.PutUint32(h[off:], v) }
	put4(0, "RIFF")
	put4(8, "AVI ")
	put4(12, "LIST")
	put32(16, 192) // hdrl: "hdrl", avih chunk (64), strl list (124)
	put4(20, "hdrl")
	put4(24, "avih")
	put32(28, 56)
	put32(32, uint32(math.Round(1e6/fps)))
	put32(44, aviHasIndex)
	put32(56, 1) // streams
	put32(64, uint32(width))
	put32(68, uint32(height))
	put4(88, "LIST")
	put32(92, 116) // strl: "strl", strh chunk (64), strf chunk (48)
	put4(96, "strl")
	put4(100, "strh")
	put32(104, 56)
	put4(108, "vids")
	put4(112, "MJPG")
	put32(128, aviFrameRateDn)
	put32(132, uint32(math.Round(fps*aviFrameRateDn)))
	put32(148, math.MaxUint32) // quality: default
	le.PutUint16(h[160:], uint16(width))
	le.PutUint16(h[162:], uint16(height))
	put4(164, "strf")
	put32(168, 40)
	put32(172, 40) // BITMAPINFOHEADER size
	put32(176, uint32(width))
	put32(180, uint32(height))
	le.PutUint16(h[184:], 1)  // planes
	le.PutUint16(h[186:], 24) // bits per pixel once decoded
	put4(188, "MJPG")
	put32(192, uint32(width*height*3))
	put4(212, "LIST")
	put4(aviMoviFourCC, "movi")
	if _, err := a.w.Write(h); err != nil {
		f.Close()
		return nil, fmt.Errorf("create clip: %w", err)
	}
	a.pos = aviHeaderLen
	return a, nil
}

// add appends one JPEG frame.
func (a *aviWriter) add(jpeg []byte) error {
	n := len(jpeg)
	if n == 0 {
		return errors.New("clip frame: empty JPEG")
	}
	if a.pos+int64(n)+8+int64(16*(len(a.index)+1)) > aviFrameMax {
		return errors.New("clip frame: the clip reached 1 GiB")
	}
	var hdr [8]byte
	copy(hdr[:4], "00dc")
	binary.LittleEndian.PutUint32(hdr[4:], uint32(n))
	a.index = append(a.index, aviChunk{offset: uint32(a.pos - aviMoviFourCC), size: uint32(n)})
	a.maxLen = max(a.maxLen, uint32(n))
	pad := n & 1
	if _, err := a.w.Write(hdr[:]); err != nil {
		return fmt.Errorf("clip frame: %w", err)
	}
	if _, err := a.w.Write(jpeg); err != nil {
		return fmt.Errorf("clip frame: %w", err)
	}
	if pad == 1 {
		if err := a.w.WriteByte(0); err != nil {
			return fmt.Errorf("clip frame: %w", err)
		}
	}
	a.pos += 8 + int64(n+pad)
	return nil
}

// frames is the number of frames added.
func (a *aviWriter) frames() int { return len(a.index) }

// close writes the index, fills in the header's sizes and counts, and
// syncs and closes the file.
func (a *aviWriter) close() error {
	le := binary.LittleEndian
	moviEnd := a.pos
	idx := make([]byte, 8+16*len(a.index))
	copy(idx, "idx1")
	le.PutUint32(idx[4:], uint32(16*len(a.index)))
	for i, c := range a.index {
		e := idx[8+16*i:]
		copy(e, "00dc")
		le.PutUint32(e[4:], aviKeyFrame)
		le.PutUint32(e[8:], c.offset)
		le.PutUint32(e[12:], c.size)
	}
	_, err := a.w.Write(idx)
	if err == nil {
		err = a.w.Flush()
	}
	total := moviEnd + int64(len(idx))
	patch := func(off int64, v uint32) {
		if err != nil {
			return
		}
		var b [4]byte
		le.PutUint32(b[:], v)
		_, err = a.f.WriteAt(b[:], off)
	}
	patch(aviRiffSize, uint32(total-8))
	patch(aviTotalFrames, uint32(len(a.index)))
	patch(aviSuggested, a.maxLen+8)
	patch(aviStreamLen, uint32(len(a.index)))
	patch(aviStreamBuf, a.maxLen+8)
	patch(aviMoviSize, uint32(moviEnd-aviMoviFourCC))
	if err == nil {
		err = a.f.Sync()
	}
	if cerr := a.f.Close(); err == nil {
		err = cerr
	}
	if err != nil {
		return fmt.Errorf("finish clip: %w", err)
	}
	return nil
}
