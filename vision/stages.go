package vision

import "time"

// Stage is one step of the mean–variance detector's work on a frame, in
// the order Detect does them.
type Stage int

// The stages of Detect. Decoding happens before Detect and is not one of
// them.
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

// Stages lists the stages in the order Detect runs them.
func Stages() []Stage { return []Stage{StageRectify, StageModel, StageCandidates} }
