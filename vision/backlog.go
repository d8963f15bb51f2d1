package vision

import "time"

// A live source whose frames are read more slowly than they come (a CPU
// busy with several cameras, a slow disk writing evidence) builds up a
// queue in the stream's buffers, and every alarm is then reported as late
// as the queue is long: measured here with the RTSP relay, a reader taking
// 0.25 s per frame of a 10 fps stream held frames 5.5–7.1 s old after 12 s,
// and fell further behind. So a live source's frames are timed against the
// stream's own clock, and when the frame just taken is more than
// SourceConfig.MaxLag behind the newest one, frames are decoded and
// dropped unconverted and unsearched until it is not.

// defaultMaxLag is SourceConfig.MaxLag's default.
const defaultMaxLag = 500 * time.Millisecond

// backlog follows how far behind a live stream the reader is.
//
// The lag of a frame is its offset (the wall time it was taken minus its
// stream time) less the offset of a frame that was taken as soon as it
// came. A read that had to wait for its frame had an empty queue behind
// it: its offset is the baseline. Every read that waits sets the baseline
// again, so it follows the stream's clock drifting against the wall clock
// and any jump in stream time. Should waiting go unnoticed, a read drops
// no more frames than its lag says are queued; a lag still left after
// that is the clocks' and becomes the baseline.
type backlog struct {
	base  time.Duration
	based bool
	prev  time.Duration // stream time of the previous frame
	step  time.Duration // the stream's frame spacing, 0 until seen
}

// grabbed is one frame taken from the stream.
type grabbed struct {
	wall   time.Duration // when it was taken, from any fixed start
	stream time.Duration // its stream time
	took   time.Duration // how long the grab took
}

// observe takes one frame and returns its lag behind the newest one.
func (b *backlog) observe(f grabbed) time.Duration {
	if d := f.stream - b.prev; b.based && d > 0 && d < time.Second {
		b.step = d
	}
	b.prev = f.stream
	off := f.wall - f.stream
	if f.took >= b.waitAt() || !b.based || off < b.base {
		b.base, b.based = off, true
	}
	return off - b.base
}

// waitAt is how long a grab that waited for its frame takes at least: half
// the frame spacing (decoding a queued frame takes a few milliseconds).
func (b *backlog) waitAt() time.Duration {
	if b.step > 0 {
		return b.step / 2
	}
	return 50 * time.Millisecond
}

// read takes frames with grab until one is at most maxLag behind the
// stream (negative maxLag: the first one) and returns how many it dropped.
func (b *backlog) read(grab func() (grabbed, error), maxLag time.Duration) (dropped int, err error) {
	budget, prev := -1, time.Duration(-1)
	for {
		f, err := grab()
		if err != nil {
			return dropped, err
		}
		lag := b.observe(f)
		if maxLag < 0 || lag <= maxLag {
			return dropped, nil
		}
		step := b.step
		if step <= 0 {
			step = 100 * time.Millisecond
		}
		if budget < 0 {
			budget = int(lag/step) + 2 // the frames this lag says are queued
		}
		// Each frame dropped from a queue brings the next one about a
		// frame spacing nearer the stream; a lag that does not shrink, or
		// outlasts its budget, is the clocks', not a queue.
		if budget == 0 || (prev >= 0 && lag > prev-step/2) {
			b.base = f.wall - f.stream
			return dropped, nil
		}
		budget--
		dropped++
		prev = lag
	}
}

// reset forgets the baseline: a new connection has a clock of its own.
func (b *backlog) reset() { *b = backlog{} }
