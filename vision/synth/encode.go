package synth

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
)

// VideoExt returns the file extension a scene's clip is written with:
// .avi for the top-down renderer and for MJPEG, .mp4 for MPEG-4 and H.264.
func VideoExt(s Scene) string {
	if s.World == nil || s.World.Encoding.Codec == "mjpeg" {
		return ".avi"
	}
	return ".mp4"
}

// ffmpegSink encodes raw BGR frames through an ffmpeg process.
type ffmpegSink struct {
	cmd    *exec.Cmd
	in     io.WriteCloser
	stderr bytes.Buffer
	path   string
}

// ffmpegArgs returns the encoder arguments for an encoding: quality as
// ffmpeg's -q:v for MJPEG and MPEG-4, -crf for H.264 (libx264), a key
// frame every GOP frames, and bit-exact output so a render repeats.
func ffmpegArgs(e Encoding, w, h int, fps float64, path string) []string {
	a := []string{"-hide_banner", "-loglevel", "error", "-nostdin",
		"-f", "rawvideo", "-pix_fmt", "bgr24", "-s", fmt.Sprintf("%dx%d", w, h), "-r", strconv.FormatFloat(fps, 'f', -1, 64), "-i", "-",
		"-fflags", "+bitexact", "-flags:v", "+bitexact", "-threads", "1"}
	q := strconv.Itoa(e.Quality)
	g := strconv.Itoa(max(1, e.GOP))
	switch e.Codec {
	case "mjpeg":
		a = append(a, "-c:v", "mjpeg", "-q:v", q, "-pix_fmt", "yuvj420p", "-f", "avi")
	case "mpeg4":
		a = append(a, "-c:v", "mpeg4", "-q:v", q, "-g", g, "-bf", "0", "-tag:v", "mp4v", "-pix_fmt", "yuv420p", "-f", "mp4")
	default:
		// IP cameras commonly stream without B-frames (common practice).
		a = append(a, "-c:v", "libx264", "-preset", "veryfast", "-crf", q, "-g", g, "-keyint_min", g, "-sc_threshold", "0", "-bf", "0",
			"-pix_fmt", "yuv420p", "-f", "mp4")
	}
	return append(a, "-y", path)
}

func openFFmpeg(ctx context.Context, path string, w, h int, fps float64, e Encoding) (*ffmpegSink, error) {
	bin, err := exec.LookPath("ffmpeg")
	if err != nil {
		return nil, fmt.Errorf("encode %s: family scenes are encoded by ffmpeg, which is not on PATH: %w", filepath.Base(path), err)
	}
	sk := &ffmpegSink{path: path}
	sk.cmd = exec.CommandContext(ctx, bin, ffmpegArgs(e, w, h, fps, path)...)
	sk.cmd.Stderr = &limitedBuffer{b: &sk.stderr, n: 4096}
	if sk.in, err = sk.cmd.StdinPipe(); err != nil {
		return nil, fmt.Errorf("encode %s: %w", path, err)
	}
	if err := sk.cmd.Start(); err != nil {
		return nil, fmt.Errorf("encode %s: start ffmpeg: %w", path, err)
	}
	return sk, nil
}

func (sk *ffmpegSink) Write(frame []byte) error {
	if _, err := sk.in.Write(frame); err != nil {
		werr := sk.cmd.Wait()
		return fmt.Errorf("encode %s: ffmpeg stopped (%v): %s: %w", sk.path, werr, strings.TrimSpace(sk.stderr.String()), err)
	}
	return nil
}

// Close ends the stream and waits for ffmpeg to finish the file.
func (sk *ffmpegSink) Close() error {
	cerr := sk.in.Close()
	if err := sk.cmd.Wait(); err != nil {
		return fmt.Errorf("encode %s: ffmpeg: %s: %w", sk.path, strings.TrimSpace(sk.stderr.String()), err)
	}
	if cerr != nil && !errors.Is(cerr, io.ErrClosedPipe) {
		return fmt.Errorf("encode %s: %w", sk.path, cerr)
	}
	return nil
}

// limitedBuffer keeps the first n bytes written to it.
type limitedBuffer struct {
	b *bytes.Buffer
	n int
}

func (l *limitedBuffer) Write(p []byte) (int, error) {
	if room := l.n - l.b.Len(); room > 0 {
		l.b.Write(p[:min(room, len(p))])
	}
	return len(p), nil
}
