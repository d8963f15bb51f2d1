package vision

import "time"

// Stage is one step of the mean–variance detector's work on a frame, in
// the order Detect does them.
type Stage int

// The stages of Detect, then the camera's own work before it, which only
// a Camera given a clock (Camera.SetStageClock) times.
const (
	// StageRectify remaps the camera frame onto the pool grid (the
	// resize and, for a grey source, the colour conversion).
	StageRectify Stage = iota
	// StageModel is the background model: glints, blur, the short mean,
	// the local light, the structure term and the per-cell score.
	StageModel
	// StageCandidates thresholds the score, joins and labels the
	// components and measures each candidate's features.
	StageCandidates
	// StageDecode is the camera reading the next frame: the FFmpeg
	// backend's demuxing and decoding, on the camera's goroutine.
	StageDecode
	// StageChecks is the picture-health probe (black, frozen, noise).
	StageChecks
	nStages
)

func (s Stage) String() string {
	switch s {
	case StageRectify:
		return "rectify"
	case StageModel:
		return "model"
	case StageCandidates:
		return "candidates"
	case StageDecode:
		return "decode"
	case StageChecks:
		return "checks"
	}
	return "stage?"
}

// StageClock adds up the wall time Detect spends in each Stage. It is for
// benchmarks and profiling; a detector without one pays one nil check per
// stage.
type StageClock struct {
	total [nStages]time.Duration
	last  time.Time
	// Frames counts the frames that reached the candidates stage.
	Frames int
}

func (c *StageClock) start() {
	if c != nil {
		c.last = time.Now()
	}
}

// lap ends stage s and starts the next.
func (c *StageClock) lap(s Stage) {
	if c == nil {
		return
	}
	now := time.Now()
	c.total[s] += now.Sub(c.last)
	c.last = now
}

// Total is the time spent in stage s so far.
func (c *StageClock) Total(s Stage) time.Duration { return c.total[s] }

// Stages lists the stages of Detect in the order it runs them; StageDecode
// and StageChecks come before them in Camera.Next.
func Stages() []Stage { return []Stage{StageRectify, StageModel, StageCandidates} }

// SetStageClock makes the camera time its frames into clock: decoding and
// the picture checks in Next and, for the mean–variance detector, the
// stages of Detect. nil stops the timing. For benchmarks: a file played in
// real time counts its wait for each frame's time as decoding. The camera
// does not own the clock.
func (c *Camera) SetStageClock(clock *StageClock) {
	c.clock = clock
	if d, ok := c.det.(*meanVar); ok {
		d.clock = clock
	}
}
