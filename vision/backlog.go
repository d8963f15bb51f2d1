package vision

import "time"

// A live source whose frames are read more slowly than they come (a CPU
// busy with several cameras, a slow disk writing evidence) builds up a
// queue in the stream's buffers, and every alarm is then reported as late
// as the queue is long: measured here with the RTSP relay, a reader taking
// 0.27 s per frame of a 10 fps stream was 11 s behind after 18 s, and
// falling further behind. So a live source's frames are measured against
// the stream's own clock, and when the frame just taken is more than
// SourceConfig.MaxLag behind the newest one, frames are decoded and
// dropped unconverted and unsearched until it is not.

// defaultMaxLag is SourceConfig.MaxLag's default.
const defaultMaxLag = 500 * time.Millisecond

// backlog follows how far behind a live stream the reader is.
//
// The lag of a frame is its offset (the wall time it was taken minus its
// stream time) less the offset of a frame that was taken as soon as it
// came. A read that had to wait for its frame had an empty queue behind
// it: its offset is the baseline. The baseline follows the stream's clock
// drifting against the wall clock and any jump in stream time, because
// every read that waits sets it again; a reader that has caught up waits
// on its next read.
type backlog struct {
	base  time.Duration
	based bool
}

// observe takes one frame: wall is when it was taken, stream its stream
// time, waited whether the read had to wait for it. It returns the frame's
// lag behind the newest one.
func (b *backlog) observe(wall, stream time.Duration, waited bool) time.Duration {
	off := wall - stream
	if waited || !b.based || off < b.base {
		b.base, b.based = off, true
	}
	return off - b.base
}

// reset forgets the baseline: a new connection has a clock of its own.
func (b *backlog) reset() { *b = backlog{} }
