package vision

import (
	"fmt"
	"time"

	"gocv.io/x/gocv"
)

// A decoder that joins a stream between key frames has no reference
// picture for the frames it receives until the next key frame. FFmpeg's
// MPEG-4 decoder then paints the missing picture mid-grey and patches in
// the macroblocks each new frame updates (seen in the RTSP test: "first
// frame is no keyframe", then frames of flat grey filling in block by
// block, BGR 130 after the YUV conversion); its H.264 decoder gives no
// frame until the key frame instead (TestDecoderFillIsRecognised). Grey
// frames would be foreground everywhere, and a model that learns them
// reports blocks of real water as blobs once the key frame comes. So
// after a reconnect, and when a live source is first opened, frames are
// only probed until the picture can be trusted again:
//
//   - it matches the background kept from before the outage for
//     rejoinMatchFrames frames in a row (the camera came back to the same
//     view: the model is kept, and a child who entered during the outage is
//     found at once); or
//   - it has been whole and steady for rejoinSteady (the view changed during
//     the outage, e.g. the light did: the model is rebuilt and warms up
//     again); or
//   - RejoinLimit has passed (the model is rebuilt whatever the picture: a
//     camera is never left unwatched for longer than this).
const (
	// fillLo and fillHi bound the decoder's grey in every channel: Y = 128
	// is BGR 130 in limited range and 128 in full range. A wider band
	// (124–136) took dim water in the night scene for fill.
	fillLo, fillHi = 127, 132
	// fillBlock is the side of the square, in processing pixels, that must
	// be all fill grey for its centre to count: the decoder paints whole
	// macroblocks (16×16 source pixels) flat, while grey in a real picture
	// (dim water at night, a street) comes in scattered, noisy pixels.
	fillBlock = 5
	// rejoinFillMax is the share of the watched area that may be flat fill
	// grey in a whole picture: a third of one 16×16 macroblock (after the
	// erosion) in the pool area of a 640×480 frame. Measured: 0 in every
	// synthetic scene, 0.0002 in vtest.avi's grey street (TestWorkingCamerasSettle).
	rejoinFillMax = 0.0003
	// rejoinMatchMax is the share of the watched area that may differ from
	// the kept model in a picture that matches it; a small child's head
	// and shoulders are well under 1 % of a 8 × 4 m pool.
	rejoinMatchMax    = 0.05
	rejoinMatchFrames = 3
	// rejoinSteadyMax is the share of the watched area that may change by
	// more than rejoinStep grey levels from one frame to the next in a
	// steady picture.
	rejoinSteadyMax = 0.05
	rejoinStep      = 25
	rejoinSteady    = 1500 * time.Millisecond
)

// RejoinLimit is the longest a (re)connected camera's frames are only
// probed: after it the background is learned anew whatever the picture.
const RejoinLimit = 10 * time.Second

// Rejoin outcomes, reported in Result.Rejoined on the frame that ends the
// probing.
const (
	RejoinKept    = "kept"    // the picture matches the kept background
	RejoinRebuilt = "rebuilt" // the view changed: the model starts again
	RejoinForced  = "forced"  // RejoinLimit passed: the model starts again
)

// probeStats is what probe measured on one frame.
type probeStats struct {
	Fill     float64 // share of the watched area in decoder-fill grey
	Change   float64 // share that changed since the previous probed frame; -1 for the first
	Mismatch float64 // share that is foreground against the kept model; -1 with no model
}

// probe measures a frame against the kept model without learning from it
// and without reporting blobs.
func (d *Detector) probe(frame gocv.Mat) (probeStats, error) {
	st := probeStats{Change: -1, Mismatch: -1}
	if err := d.prepare(frame); err != nil {
		return st, err
	}
	if d.maskArea == 0 {
		return st, nil
	}
	area := float64(d.maskArea)
	if d.small.Channels() == 3 {
		gocv.InRangeWithScalar(d.small, gocv.NewScalar(fillLo, fillLo, fillLo, 0), gocv.NewScalar(fillHi, fillHi, fillHi, 0), &d.glint)
	} else {
		gocv.InRangeWithScalar(d.small, gocv.NewScalar(fillLo, 0, 0, 0), gocv.NewScalar(fillHi, 0, 0, 0), &d.glint)
	}
	gocv.BitwiseAnd(d.glint, d.mask, &d.glint)
	gocv.Erode(d.glint, &d.glint, d.kFill)
	st.Fill = float64(gocv.CountNonZero(d.glint)) / area
	if !d.prevGray.Empty() {
		gocv.AbsDiff(d.gray, d.prevGray, &d.dark)
		gocv.Threshold(d.dark, &d.dark, rejoinStep, 255, gocv.ThresholdBinary)
		gocv.BitwiseAnd(d.dark, d.mask, &d.dark)
		st.Change = float64(gocv.CountNonZero(d.dark)) / area
	}
	d.gray.CopyTo(&d.prevGray)
	if d.frames > 0 {
		if err := d.bg.apply(d.small, &d.fg, 0); err != nil {
			return st, err
		}
		gocv.Threshold(d.fg, &d.bin, 200, 255, gocv.ThresholdBinary)
		gocv.BitwiseAnd(d.bin, d.mask, &d.bin)
		gocv.MorphologyEx(d.bin, &d.bin, gocv.MorphOpen, d.kOpen)
		st.Mismatch = float64(gocv.CountNonZero(d.bin)) / area
	}
	return st, nil
}

// reset drops the background model: the next frames warm a new one up.
func (d *Detector) reset() error {
	if err := d.bg.Close(); err != nil {
		return fmt.Errorf("reset detector: %w", err)
	}
	d.bg = newBackground(d.kind, d.cfg.History, d.cfg.Threshold, true)
	d.frames, d.relearn = 0, 0
	return nil
}

// resume keeps the mixture model as it is: it holds no frames from before
// the gap.
func (d *Detector) resume() error { return nil }

// rejoin follows the probing of one (re)connect.
type rejoin struct {
	begun   bool
	start   time.Duration // media time of the first probed frame
	matched int
	steady  int
	since   time.Duration // media time the picture became steady
}

// step takes one probed frame at media time t and returns the outcome, or
// "" while the picture is not trusted yet.
func (j *rejoin) step(t time.Duration, p probeStats) string {
	if !j.begun {
		// The detector's previous frame is from before the outage.
		j.begun, j.start, p.Change = true, t, -1
	}
	whole := p.Fill <= rejoinFillMax
	if whole && p.Mismatch >= 0 && p.Mismatch <= rejoinMatchMax {
		j.matched++
	} else {
		j.matched = 0
	}
	if j.matched >= rejoinMatchFrames {
		return RejoinKept
	}
	if whole && p.Change >= 0 && p.Change <= rejoinSteadyMax {
		if j.steady == 0 {
			j.since = t
		}
		j.steady++
	} else {
		j.steady = 0
	}
	if j.steady >= rejoinMatchFrames && t-j.since >= rejoinSteady {
		return RejoinRebuilt
	}
	if t-j.start >= RejoinLimit {
		return RejoinForced
	}
	return ""
}
