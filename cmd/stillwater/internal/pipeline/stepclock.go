package pipeline

import "time"

// StepStage is one part of Processor.Step's work on a frame, in the order
// Step does them.
type StepStage int

const (
	// StepGate places, zones and size-gates the frame's candidates (the
	// rectified detector's are already on the pool plane).
	StepGate StepStage = iota
	// StepTrack associates the detections with the tracks in pool metres.
	StepTrack
	// StepJudge says which tracks may raise an alarm.
	StepJudge
	// StepAlarm is the alarm's decisions and the encoding of their
	// messages (the floor position below the swimmer included).
	StepAlarm
	nStepStages
)

func (s StepStage) String() string {
	switch s {
	case StepGate:
		return "gate"
	case StepTrack:
		return "track"
	case StepJudge:
		return "judge"
	case StepAlarm:
		return "alarm"
	}
	return "step?"
}

// StepStages lists the stages in the order Step runs them.
func StepStages() []StepStage { return []StepStage{StepGate, StepTrack, StepJudge, StepAlarm} }

// StepClock adds up the wall time Step spends in each StepStage. It is
// for benchmarks and profiling (Processor.Clock); a processor without one
// pays one nil check per stage.
type StepClock struct {
	total [nStepStages]time.Duration
	last  time.Time
	// Frames counts the frames Step searched (not those only probed).
	Frames int
}

func (c *StepClock) start() {
	if c != nil {
		c.last = time.Now()
	}
}

// lap ends stage s and starts the next.
func (c *StepClock) lap(s StepStage) {
	if c == nil {
		return
	}
	now := time.Now()
	c.total[s] += now.Sub(c.last)
	c.last = now
}

// Total is the time spent in stage s so far.
func (c *StepClock) Total(s StepStage) time.Duration { return c.total[s] }
