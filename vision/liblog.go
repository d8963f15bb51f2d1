package vision

// #include "shim.h"
import "C"

import (
	"bufio"
	"context"
	"errors"
	"log/slog"
	"os"
	"strconv"
	"strings"
	"syscall"
)

// ForwardLibraryLog sends the video backend's own log lines (FFmpeg's:
// damaged packets, refused streams, protocol errors) into log as records
// of their own, instead of letting them reach stderr past the daemon's
// structured log, until stop is called. FFmpeg's logger is one per
// process: call it once, from the daemon. OpenCV's own messages cannot be
// taken over in 4.6 (its logger has no hook for another sink before 4.7);
// they keep going to stderr at OpenCV's default level (warnings), which
// the opens here do not trigger.
func ForwardLibraryLog(log *slog.Logger) (stop func(), err error) {
	var p [2]int
	if err := syscall.Pipe2(p[:], syscall.O_CLOEXEC); err != nil {
		return nil, err
	}
	if err := syscall.SetNonblock(p[1], true); err != nil {
		syscall.Close(p[0])
		syscall.Close(p[1])
		return nil, err
	}
	if C.sw_log_forward(C.int(p[1])) != 0 {
		syscall.Close(p[0])
		syscall.Close(p[1])
		return nil, errors.New("forward the video backend's log: libavutil's log functions are not in this process")
	}
	r := os.NewFile(uintptr(p[0]), "ffmpeg log")
	done := make(chan struct{})
	go func() {
		defer close(done)
		sc := bufio.NewScanner(r)
		for sc.Scan() {
			lvl, text, _ := strings.Cut(sc.Text(), " ")
			n, _ := strconv.Atoi(lvl)
			log.Log(context.Background(), ffmpegLevel(n), "video backend says", "library", "ffmpeg", "text", strings.TrimSpace(text))
		}
	}()
	return func() {
		C.sw_log_forward(-1)
		syscall.Close(p[1])
		<-done
		r.Close()
	}, nil
}

// ffmpegLevel maps FFmpeg's log levels (libavutil/log.h: 0 panic, 8
// fatal, 16 error, 24 warning, 32 info) onto slog's.
func ffmpegLevel(n int) slog.Level {
	switch {
	case n <= 16:
		return slog.LevelError
	case n <= 24:
		return slog.LevelWarn
	case n <= 32:
		return slog.LevelInfo
	default:
		return slog.LevelDebug
	}
}
