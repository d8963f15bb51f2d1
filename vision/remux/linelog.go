package remux

import (
	"bytes"
	"log/slog"
	"sync"
	"time"
)

// lineLog writes a child's output to the log a line at a time, at most
// limit lines per period; the lines left out are counted and the count
// logged with the next line let through (or by flush).
type lineLog struct {
	log   *slog.Logger
	limit int
	per   time.Duration

	mu      sync.Mutex
	buf     []byte
	since   time.Time
	n       int
	dropped int
}

func (l *lineLog) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	l.buf = append(l.buf, p...)
	for {
		i := bytes.IndexByte(l.buf, '\n')
		if i < 0 {
			break
		}
		l.line(string(bytes.TrimRight(l.buf[:i], "\r")))
		l.buf = l.buf[i+1:]
	}
	if len(l.buf) > 4096 { // a child writing without newlines
		l.line(string(l.buf))
		l.buf = l.buf[:0]
	}
	return len(p), nil
}

func (l *lineLog) line(s string) {
	if s == "" {
		return
	}
	now := time.Now()
	if now.Sub(l.since) > l.per {
		l.since, l.n = now, 0
	}
	if l.n >= l.limit {
		l.dropped++
		return
	}
	l.n++
	if l.dropped > 0 {
		l.log.Warn("evidence recorder: ffmpeg", "msg", s, "lines_not_logged", l.dropped)
		l.dropped = 0
		return
	}
	l.log.Warn("evidence recorder: ffmpeg", "msg", s)
}

// flush logs what is left once the child has ended.
func (l *lineLog) flush() {
	l.mu.Lock()
	defer l.mu.Unlock()
	if len(l.buf) > 0 {
		l.line(string(l.buf))
		l.buf = nil
	}
	if l.dropped > 0 {
		l.log.Warn("evidence recorder: ffmpeg lines not logged", "lines", l.dropped)
		l.dropped = 0
	}
}
