package watch

import (
	"context"
	"fmt"
	"time"

	"stillwater/alert"
)

// A camera whose frames are searched late makes every alarm late by as
// much, and nothing else would say so: a live source drops frames to catch
// up only while decoding keeps up, and a file played in real time used to
// fall behind without a trace. So the age of each frame when its
// processing ends (from when it was taken to its messages being handed to
// the bus) is a metric, and a frame older than maxFrameAge raises
// processing_lag.

const (
	// MaxFrameAge is the age of a searched frame that raises
	// processing_lag: a second added to an alarm is a second of a child
	// under water (ASTM F2208 allows 20 s from entry to alarm in all), and
	// far beyond what a keeping-up reader shows (one frame interval plus
	// its processing).
	MaxFrameAge = time.Second
	// lagClearAfter is how long frames must be in time again before the
	// fault clears, so that a reader hovering at the limit does not flap.
	lagClearAfter = 5 * time.Second
)

// lagWatch follows one camera's frame age (capture goroutine only).
type lagWatch struct {
	inTimeSince time.Time // first frame in time since the last late one; zero while late
}

// frameAge records the age of the frame just processed and raises or
// clears processing_lag. Like camera_lost, the fault is raised only while
// armed; it clears whenever frames are in time again.
func (w *Camera) frameAge(ctx context.Context, age time.Duration, armed bool) {
	w.met.FrameAge(age)
	now := time.Now()
	if age > MaxFrameAge {
		w.lag.inTimeSince = time.Time{}
		if armed {
			w.Raise(ctx, alert.FaultProcessingLag, true, fmt.Sprintf("a frame was searched %.1f s after it was taken (limit %.0f s)", age.Seconds(), MaxFrameAge.Seconds()))
		}
		return
	}
	if w.lag.inTimeSince.IsZero() {
		w.lag.inTimeSince = now
	}
	if now.Sub(w.lag.inTimeSince) >= lagClearAfter {
		w.Raise(ctx, alert.FaultProcessingLag, false, fmt.Sprintf("frames searched within %.0f s of being taken for %.0f s", MaxFrameAge.Seconds(), lagClearAfter.Seconds()))
	}
}
