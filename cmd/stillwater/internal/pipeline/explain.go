package pipeline

import (
	"fmt"
	"io"
	"math"
	"strings"
	"time"

	"stillwater/homography"
	"stillwater/vision"
	"stillwater/vision/synth"
)

// candidateNote is what became of one candidate of the rectified detector
// in a frame: rejected (and why), or handed to the tracker (Track, once
// known).
type candidateNote struct {
	At       homography.Point // pool metres on the water surface
	Features vision.Features
	Rejected string // why, or "" when it went to the tracker
	Outside  bool   // rejected for its centre being off the water
	Track    int    // the track it joined, 0 when rejected
}

// noteTracks links this frame's accepted candidates to the tracks that
// took them: the nearest track seen in this frame.
func (p *Processor) noteTracks() {
	for i := range p.notes {
		n := &p.notes[i]
		if n.Rejected != "" {
			continue
		}
		best := math.Inf(1)
		for _, t := range p.Tracks {
			if d := math.Hypot(t.X-n.At.X, t.Y-n.At.Y); d < best && t.Last == p.tracker.Now() {
				best, n.Track = d, t.ID
			}
		}
	}
}

// explainer says, for a replayed clip with labels, why a labelled intruder
// in the water was not reported in a frame: no alarm was active on a track
// near it. It writes one line per explained frame.
type explainer struct {
	truth synth.Truth
	w     io.Writer
	far   float64       // m: a track farther than this from the intruder is not theirs
	every time.Duration // explain an unreported frame at most this often (0: never unasked)
	asked map[int]bool  // frames to explain whatever happened
	last  time.Duration
	had   bool
}

// NewExplainer explains frames of a clip labelled t on w; far is the
// distance, pool metres, beyond which a track is not the intruder's.
func NewExplainer(t synth.Truth, far float64, w io.Writer, every time.Duration, frames []int) *explainer {
	e := &explainer{truth: t, w: w, far: far, every: every, asked: map[int]bool{}}
	for _, f := range frames {
		e.asked[f] = true
	}
	return e
}

// Frame explains frame r after the processor's step.
func (e *explainer) Frame(p *Processor, r vision.Result) {
	var occ *synth.Occupation
	if r.Index < len(e.truth.PerFrame) && e.truth.PerFrame[r.Index].Frame == r.Index {
		occ = e.truth.PerFrame[r.Index].Intruder
	}
	t := r.Media.Seconds()
	present := false
	for _, pr := range e.truth.Presence {
		if t >= pr.From && t < pr.To {
			present = true
		}
	}
	asked := e.asked[r.Index]
	if !asked && (!present || occ == nil) {
		e.had = false
		return
	}
	line, reported := e.why(p, r, occ, present)
	if !asked {
		if reported {
			e.had = false
			return
		}
		if e.every <= 0 || (e.had && r.Media-e.last < e.every) {
			return
		}
	}
	e.had, e.last = true, r.Media
	fmt.Fprintln(e.w, line)
}

// why returns the explanation of one frame and whether the intruder was
// reported in it.
func (e *explainer) why(p *Processor, r vision.Result, occ *synth.Occupation, present bool) (string, bool) {
	head := fmt.Sprintf("frame %d (%.2f s):", r.Index, r.Media.Seconds())
	if occ == nil {
		return head + fmt.Sprintf(" no labelled intruder; %d candidates, %d tracks, %d in alarm", len(p.notes), len(p.Tracks), len(p.alarmed)), false
	}
	head += fmt.Sprintf(" intruder at (%.2f, %.2f) m", occ.X, occ.Y)
	if !present {
		head += " (not in the water)"
	}
	at := homography.Point{X: occ.X, Y: occ.Y}
	// An alarm on a track near the intruder: reported.
	for _, t := range p.Tracks {
		if p.alarmed[t.ID] && math.Hypot(t.X-at.X, t.Y-at.Y) <= e.far {
			return head + fmt.Sprintf(" reported by track %d at (%.2f, %.2f) m, %.2f m away", t.ID, t.X, t.Y, math.Hypot(t.X-at.X, t.Y-at.Y)), true
		}
	}
	head += " not reported:"
	if !present {
		head = strings.TrimSuffix(head, " not reported:") + ":"
	}
	switch {
	case r.Stats.WarmingUp:
		return head + " the detector is still learning the water (warm-up, or the first seconds from the empty-pool reference)", false
	case r.Stats.SceneChange:
		return head + fmt.Sprintf(" %.0f %% of the water changed at once (light or exposure); the detector relearns and reports nothing", 100*r.Stats.ForegroundFraction), false
	case r.Stats.Relearning:
		return head + " the detector is relearning the water after a scene-wide change", false
	}
	// The nearest track, then the nearest candidate.
	var near *poolTrack
	best := math.Inf(1)
	for i, t := range p.Tracks {
		if d := math.Hypot(t.X-at.X, t.Y-at.Y); d < best {
			best, near = d, &p.Tracks[i]
		}
	}
	if near != nil && best <= e.far {
		ok, why := p.judge.eligible(near.ID)
		f, n, _ := p.judge.summary(near.ID)
		dwell := near.Last - near.First
		var s string
		switch {
		case near.Last != p.tracker.Now():
			s = fmt.Sprintf(" track %d at (%.2f, %.2f) m, %.2f m away, had no candidate in this frame (last %.2f s ago)", near.ID, near.X, near.Y, best, (p.tracker.Now() - near.Last).Seconds())
		case !ok:
			s = fmt.Sprintf(" track %d at (%.2f, %.2f) m, %.2f m away, may not alarm: %s", near.ID, near.X, near.Y, best, why)
		case p.Frozen && !p.alarmed[near.ID]:
			s = fmt.Sprintf(" track %d at (%.2f, %.2f) m, %.2f m away: the picture is reported frozen, and no new target starts", near.ID, near.X, near.Y, best)
		case p.bornStill(*near, r.Media):
			s = fmt.Sprintf(" track %d at (%.2f, %.2f) m, %.2f m away, began after the water stopped moving %.2f s ago: held for the first %v of the stillness, while a frozen picture would not yet be reported", near.ID, near.X, near.Y, best, (r.Media - p.StillSince).Seconds(), stillHold)
		case dwell < time.Duration(p.cam.Detect.Persist):
			s = fmt.Sprintf(" track %d at (%.2f, %.2f) m, %.2f m away, seen for %.2f s of the %v it must last", near.ID, near.X, near.Y, best, dwell.Seconds(), time.Duration(p.cam.Detect.Persist))
		default:
			s = fmt.Sprintf(" track %d at (%.2f, %.2f) m, %.2f m away, seen for %.2f s in %d frames, not yet alarmed (seen in too few of its frames, or moving faster than a child swims)", near.ID, near.X, near.Y, best, dwell.Seconds(), near.Hits)
		}
		return head + s + "; " + featureText(f, n), false
	}
	var nc *candidateNote
	best = math.Inf(1)
	for i, n := range p.notes {
		if d := n.At.Dist(at); d < best {
			best, nc = d, &p.notes[i]
		}
	}
	if nc == nil {
		return head + " no candidate anywhere: nothing differs from the learned water by more than the thresholds", false
	}
	s := fmt.Sprintf(" nearest candidate at (%.2f, %.2f) m, %.2f m away", nc.At.X, nc.At.Y, best)
	switch {
	case nc.Rejected != "":
		s += ", rejected: " + nc.Rejected
	case nc.Track != 0:
		s += fmt.Sprintf(", tracked as track %d", nc.Track)
	}
	if best > e.far {
		s += fmt.Sprintf(" (nothing within %g m: the intruder does not differ enough from the learned water there)", e.far)
	}
	return head + s + "; " + featureText(nc.Features, 1), false
}

// featureText is a candidate's (or a track's median) features in words.
func featureText(f vision.Features, n int) string {
	var b strings.Builder
	if n > 1 {
		fmt.Fprintf(&b, "medians of %d candidates: ", n)
	}
	fmt.Fprintf(&b, "area %.3f m² (core %.3f, at half contrast %.3f), score %.0f (peak %.0f), contrast %+.2f (%.0f %% brighter), chroma %.1f (top %.1f, water %.1f), %.2f × %.2f m, %.2f m from the edge, end nearest the camera %.2f m out on the deck, %.2f of it there in this frame",
		f.Area, f.Core, f.Half, f.Score, f.Peak, f.Contrast, 100*f.Bright, f.Chroma, f.ChromaTop, f.Water, f.Length, f.Width, f.Edge, f.Foot, f.Present)
	if f.Faint {
		b.WriteString("; faint: below the threshold everywhere, found in a tracked body's held cells")
	}
	return b.String()
}

// Why is the short reason a track of the rectified detector is (or may
// become) an alarm, for the evidence snapshot's label: the medians its
// alarm was judged on. Empty for the mixture-model detectors.
func (p *Processor) Why(id int) string {
	f, n, speed := p.judge.summary(id)
	if n == 0 || p.cam.Detect.Method != "meanvar" {
		return ""
	}
	shade := "darker"
	if f.Contrast > 0 {
		shade = "brighter"
	}
	return fmt.Sprintf(": body %.3f m2 (%.2f x %.2f m), score %.0f, %.0f%% %s, tint %.0f, %.2f m/s", f.Half, f.Length, f.Width, f.Score, 100*math.Abs(f.Contrast), shade, f.Tint, speed)
}
