package vision

import "time"

// A file played in real time stands in for a live camera (the demo, the
// benchmark, a test): its frames come at their own pace whether or not
// the reader is ready. A reader that falls behind such a file must show
// it as it would behind a camera: frames more than SourceConfig.MaxLag
// late are decoded and dropped unsearched (counted in
// CaptureStats.Dropped), and Captured says when each frame was due, so
// the caller can tell how old the frame it works on is.

// pace times a file played in real time.
type pace struct {
	started bool
	start   time.Time // wall time of media time 0
}

// advancePaced puts the next frame of a file played in real time into
// c.frame: it waits for a frame that is not due yet, and drops frames
// that are more than MaxLag late, keeping the first frame and the one
// that catches up.
func (c *Camera) advancePaced() error {
	maxLag := c.sc.MaxLag
	if maxLag == 0 {
		maxLag = defaultMaxLag
	}
	for {
		primed := c.primed
		if err := c.advanceFrame(); err != nil {
			return err
		}
		media := c.mediaTime()
		if !c.pace.started {
			c.pace = pace{started: true, start: time.Now().Add(-media)}
		}
		due := c.pace.start.Add(media)
		late := time.Since(due)
		if late < 0 {
			time.Sleep(-late)
			late = 0
		}
		c.captured = due
		if primed || maxLag < 0 || late <= maxLag {
			return nil
		}
		// Too late to search: counted as read and dropped, and numbered as
		// Next would have numbered it, so that frame numbers stay those
		// of the file.
		c.index++
		c.media = media
		c.stats.Dropped++
	}
}

// Captured returns when the latest frame was taken: for a live source
// when it arrived at the head of the stream (the time it was read, less
// how far the reader was behind the stream; see backlog), for a file
// played in real time when it was due, otherwise when it was read. Now
// minus Captured is the age of the frame being worked on.
func (c *Camera) Captured() time.Time { return c.captured }

// behind returns how far a frame taken from the stream was behind the
// newest one.
func (b *backlog) behind(f grabbed) time.Duration {
	return max(0, f.wall-f.stream-b.base)
}
