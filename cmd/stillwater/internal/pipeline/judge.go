package pipeline

import (
	"fmt"
	"log/slog"
	"math"
	"sort"
	"time"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/homography"
	"stillwater/vision"
)

// judge decides which tracks of the rectified detector may raise an alarm,
// on what their candidates looked like over the last window of media time
// (the medians of their features and how far they moved), not on one
// frame: water makes candidates that pass any one test now and then.
type judge struct {
	window time.Duration
	rules  judgeRules
	tracks map[int]*trackHistory
	deck   []deckBody
	log    *slog.Logger
}

// judgeRules are the thresholds a track's evidence is held to.
type judgeRules struct {
	// MinArea is the least area at half contrast (Features.Half) of the
	// whole visible body, m²; MaxArea the most (Features.Area).
	MinArea, MaxArea float64
	// MaxLength is the longest a body can be, m.
	MaxLength float64
	// MinTint: a candidate brighter than the water whose difference from
	// it is whiter than this (Features.Tint) is light, not a body, where
	// the water has a colour to tell by.
	MinTint float64
	// MinScore is the least mean score over the candidate (Features.Score):
	// broad, faint changes of the water are not a body.
	MinScore float64
	// MaxSpeed is the fastest, m/s, a track may move over the window and
	// still start an alarm.
	MaxSpeed float64
	// DeckRadius: a track within this distance, m, of a body seen on the
	// deck in the last DeckMemory does not start an alarm; what lies on
	// the water beside someone standing at the edge is their shadow, until
	// they are in the water themselves.
	DeckRadius float64
	DeckMemory time.Duration
	// DeckMinArea is the least area, m², of a candidate on the deck that
	// counts as a body there.
	DeckMinArea float64
	// Companion: a track within this distance, m, of a live track that
	// has raised an alarm does not start another while that one lives: it
	// is the raised body's shadow on the floor, its submerged part seen
	// displaced, or its wake. 0 is off.
	Companion float64
	// Nadir is the point of the pool plane under the camera, nil when the
	// camera's position is not known: a body standing on the deck is seen
	// over the water beyond it, away from the camera.
	Nadir *homography.Point
}

// trackHistory is one track's recent candidates.
type trackHistory struct {
	feats []vision.Features
	at    []homography.Point
	times []time.Duration
	// from is where the track was first seen, when its first candidate
	// lay partly on the deck (it came over the edge); crossed says so.
	from    homography.Point
	crossed bool
	born    time.Duration // media time of its first candidate
	raised  bool          // the track has raised an alarm: it stays eligible
	verdict string        // the last reason it was not eligible, "" when it was
}

// deckBody is a candidate whose centre was on the deck; trails counts
// the frames since in which only a trail was seen near it.
type deckBody struct {
	at     homography.Point
	t      time.Duration
	trails int
}

func newJudge(window time.Duration, rules judgeRules, log *slog.Logger) *judge {
	if window <= 0 {
		window = time.Second
	}
	return &judge{window: window, rules: rules, tracks: map[int]*trackHistory{}, log: log}
}

// observe records the candidates of the tracks seen at media time now,
// and the bodies seen on the deck (deck), and forgets tracks that are
// gone and bodies remembered on the deck near where one has left (left:
// the trails the short mean still holds).
func (j *judge) observe(now time.Duration, tracks []poolTrack, deck, left []homography.Point) {
	live := map[int]bool{}
	for _, t := range tracks {
		live[t.ID] = true
		if t.Last != now {
			continue
		}
		h := j.tracks[t.ID]
		if h == nil {
			h = &trackHistory{from: homography.Point{X: t.X, Y: t.Y}, crossed: t.Features.Wet < 1, born: now}
			j.tracks[t.ID] = h
		}
		h.feats = append(h.feats, t.Features)
		h.at = append(h.at, homography.Point{X: t.X, Y: t.Y})
		h.times = append(h.times, now)
		// Keep the window, and at least the last candidate.
		cut := 0
		for cut < len(h.times)-1 && now-h.times[cut] > j.window {
			cut++
		}
		h.feats, h.at, h.times = h.feats[cut:], h.at[cut:], h.times[cut:]
	}
	for id := range j.tracks {
		if !live[id] {
			delete(j.tracks, id)
		}
	}
	keep := j.deck[:0]
	for _, b := range j.deck {
		if now-b.t <= j.rules.DeckMemory {
			if near(b.at, left, leftRadius) {
				b.trails++
			}
			keep = append(keep, b)
		}
	}
	j.deck = keep
	for _, p := range deck {
		j.deck = append(j.deck, deckBody{at: p, t: now})
	}
}

// raised marks a track as having raised an alarm.
func (j *judge) raised(id int) {
	if h := j.tracks[id]; h != nil {
		h.raised = true
	}
}

// age returns how long the judge has seen track id: from its first
// candidate on the water to its latest.
func (j *judge) age(id int) time.Duration {
	h := j.tracks[id]
	if h == nil || len(h.times) == 0 {
		return 0
	}
	return h.times[len(h.times)-1] - h.born
}

// summary returns the medians of a track's features over the window, the
// number of candidates they are of, and its speed over the window, m/s.
func (j *judge) summary(id int) (vision.Features, int, float64) {
	h := j.tracks[id]
	if h == nil || len(h.feats) == 0 {
		return vision.Features{}, 0, 0
	}
	med := func(get func(vision.Features) float64) float64 { return featureMedian(h.feats, get) }
	f := vision.Features{
		Area:      med(func(f vision.Features) float64 { return f.Area }),
		Core:      med(func(f vision.Features) float64 { return f.Core }),
		Half:      med(func(f vision.Features) float64 { return f.Half }),
		Score:     med(func(f vision.Features) float64 { return f.Score }),
		Peak:      med(func(f vision.Features) float64 { return f.Peak }),
		Contrast:  med(func(f vision.Features) float64 { return f.Contrast }),
		Bright:    med(func(f vision.Features) float64 { return f.Bright }),
		Chroma:    med(func(f vision.Features) float64 { return f.Chroma }),
		ChromaTop: med(func(f vision.Features) float64 { return f.ChromaTop }),
		Water:     med(func(f vision.Features) float64 { return f.Water }),
		Wet:       med(func(f vision.Features) float64 { return f.Wet }),
		Tint:      med(func(f vision.Features) float64 { return f.Tint }),
		Length:    med(func(f vision.Features) float64 { return f.Length }),
		Width:     med(func(f vision.Features) float64 { return f.Width }),
		Edge:      med(func(f vision.Features) float64 { return f.Edge }),
		Foot:      med(func(f vision.Features) float64 { return f.Foot }),
		Present:   med(func(f vision.Features) float64 { return f.Present }),
	}
	speed := 0.0
	if n := len(h.times); n > 1 {
		if dt := (h.times[n-1] - h.times[0]).Seconds(); dt > 0 {
			speed = h.at[n-1].Dist(h.at[0]) / dt
		}
	}
	return f, len(h.feats), speed
}

// featureMedian returns the median of one feature over fs.
func featureMedian(fs []vision.Features, get func(vision.Features) float64) float64 {
	v := make([]float64, len(fs))
	for i, f := range fs {
		v[i] = get(f)
	}
	sort.Float64s(v)
	n := len(v)
	if n == 0 {
		return 0
	}
	if n%2 == 1 {
		return v[n/2]
	}
	return (v[n/2-1] + v[n/2]) / 2
}

// eligible says whether a track may raise (or keep) an alarm, and if not,
// why. A track that has raised an alarm stays eligible while it lives.
func (j *judge) eligible(id int) (bool, string) {
	h := j.tracks[id]
	if h == nil {
		return false, "no candidates yet"
	}
	if h.raised {
		return true, ""
	}
	f, _, speed := j.summary(id)
	r := j.rules
	at := h.at[len(h.at)-1]
	why := j.unlikeBody(f, speed)
	if age := j.age(id); why == "" && age > lateAfter && f.Half < lateArea*r.MinArea {
		why = fmt.Sprintf("seen for %.1f s and only now at a child's size (%.3f m² at half contrast); a track this old must show %.3f m²: floating debris", age.Seconds(), f.Half, lateArea*r.MinArea)
	}
	if why == "" {
		if id2, d, ok := j.companionOf(id, at); ok {
			why = fmt.Sprintf("%.1f m from target %d, already raised: its shadow or wake", d, id2)
		} else if id2, d, ok := j.rivalOf(id, at, f); ok {
			why = fmt.Sprintf("%.1f m from track %d, which has colours of its own where this has none: its shadow on the floor", d, id2)
		} else {
			here := h.feats[len(h.feats)-1].Present >= trackPresent
			for _, b := range j.deck {
				// A body that came over the edge leaves its own trail on the
				// deck where it got in: the short mean still holds it there.
				if h.crossed && b.at.Dist(h.from) <= trailRadius {
					continue
				}
				d := b.at.Dist(at)
				if d <= r.DeckRadius && !h.crossed && beyond(r.Nadir, b.at, at) {
					why = fmt.Sprintf("%.1f m beyond someone on the deck, seen from the camera: their upright body over the water", d)
					break
				}
				// Someone who has left the deck holds back only what is
				// leaving too: their shadow, still in the short mean.
				if b.trails >= leftFrames && here {
					continue
				}
				// Nearer than deckSelf it is the track's own body, part of it
				// still on the deck, unless the track has no colour of its
				// own and never lay on the deck: then it is the shadow of
				// what stands at the edge (a bird on the coping).
				if d <= r.DeckRadius && (d > deckSelf || !h.crossed && colourless(f)) {
					why = fmt.Sprintf("someone is on the deck %.1f m away: a shadow until they are in the water", d)
					break
				}
			}
		}
	}
	if why != h.verdict && j.log != nil {
		args := append([]any{"track", id, "speed_mps", Round3(speed)}, featureArgs(f)...)
		if why == "" {
			j.log.Debug("track eligible to alarm", args...)
		} else {
			j.log.Debug("track not eligible to alarm: "+why, args...)
		}
	}
	h.verdict = why
	return why == "", why
}

// unlikeBody returns why a track's window of candidates (its feature
// medians f and its speed, m/s) cannot be a child's body, "" when it can.
func (j *judge) unlikeBody(f vision.Features, speed float64) string {
	r := j.rules
	switch {
	case f.Half < r.MinArea:
		return fmt.Sprintf("smaller than a child's body (%.3f m² at half contrast < %.3f m²)", f.Half, r.MinArea)
	case f.Area > r.MaxArea:
		return fmt.Sprintf("larger than a person (%.3f m² > %.3f m²)", f.Area, r.MaxArea)
	case r.MinTint > 0 && f.Contrast > 0 && f.Tint < r.MinTint && f.Water >= minWaterChroma:
		return fmt.Sprintf("light on the water (a glint or a reflection): brighter, and white (tint %.1f < %.1f)", f.Tint, r.MinTint)
	case f.Score < r.MinScore:
		return fmt.Sprintf("too faint over its area (mean score %.0f < %.0f)", f.Score, r.MinScore)
	case movedLight(f, r.MinScore):
		return fmt.Sprintf("as much brighter as darker, faintly (%.0f %% brighter, contrast %.3f, mean score %.0f): light moved by the waves, not a body", 100*f.Bright, f.Contrast, f.Score)
	case r.MaxLength > 0 && f.Length > r.MaxLength:
		return fmt.Sprintf("longer than a person (%.2f m > %.2f m)", f.Length, r.MaxLength)
	case r.MaxSpeed > 0 && speed > r.MaxSpeed:
		return fmt.Sprintf("moving faster than a child in the water (%.2f m/s > %.2f m/s)", speed, r.MaxSpeed)
	}
	return ""
}

// rivalOf returns the nearest other live track, not raised, within the
// Companion distance of at that could be a body too and has colours of
// its own while this track's window (f) has none: a body and its shadow
// on the floor may both pass every rule and, when no target is raised
// nearby (the first one ended), would both raise at once. The shadow only
// darkens the water and keeps its chromaticity (see
// vision.Features.Chroma); the body has colours of its own. Where the
// water shows no colour (a night infrared picture, lit from the camera,
// where a body hides its own shadow) nothing is held back.
func (j *judge) rivalOf(id int, at homography.Point, f vision.Features) (int, float64, bool) {
	if j.rules.Companion <= 0 || !colourless(f) {
		return 0, 0, false
	}
	best, bestD := 0, math.Inf(1)
	for other, h := range j.tracks {
		if other == id || h.raised || len(h.at) == 0 {
			continue
		}
		d := h.at[len(h.at)-1].Dist(at)
		if d > j.rules.Companion || d > bestD || d == bestD && other > best {
			continue
		}
		g, _, speed := j.summary(other)
		if g.Water < minWaterChroma || g.Chroma < shadowChroma || j.unlikeBody(g, speed) != "" {
			continue
		}
		best, bestD = other, d
	}
	return best, bestD, !math.IsInf(bestD, 1)
}

// shadowChroma is the Chroma below which a candidate has no colour of its
// own: the water's chromaticity, darkened or lit. Measured medians: a
// floating child's floor shadow 1.5 (development set H4); children in the
// water 6.9 (H4), 8.6 (H7) and 6.9 (tuning scene intruder/7). A child
// getting in, splash and all, can show none at first (0.4 and 1.1 on
// intruder/7): two such tracks do not hold each other back.
const shadowChroma = 3

// companionOf returns the nearest live track other than id that has
// raised an alarm, if one lies within the Companion distance of at.
func (j *judge) companionOf(id int, at homography.Point) (int, float64, bool) {
	if j.rules.Companion <= 0 {
		return 0, 0, false
	}
	best, bestD := 0, math.Inf(1)
	for other, h := range j.tracks {
		// A target kept only by faint candidates casts no shadow or wake
		// worth the name.
		if other == id || !h.raised || len(h.at) == 0 || h.feats[len(h.feats)-1].Faint {
			continue
		}
		if d := h.at[len(h.at)-1].Dist(at); d <= j.rules.Companion && (d < bestD || d == bestD && other < best) {
			best, bestD = other, d
		}
	}
	return best, bestD, !math.IsInf(bestD, 1)
}

// movedLight reports whether a track's medians f are light the waves
// moved rather than a body: refraction at the surface focuses light into
// bright bands and leaves dark ones beside them, so over an area about as
// much is brighter as darker and the mean contrast stays near zero. A body
// blocks or reflects light. Measured: children raised on the tuning sample
// showed 0–19 % of their area brighter and contrasts of −0.08 to −0.18;
// the development set's children −0.06 and −0.16 just before their first
// alerts; the false targets of the scenario suite's leaf scenes 40–42 %
// brighter at −0.013 to −0.029, mean score 52–56. A child at night under
// infrared light is brighter all over. A strong candidate (mean score at
// least twice minScore) is never taken for moved light: a child both paler
// and darker than the water can be half and half too.
func movedLight(f vision.Features, minScore float64) bool {
	return f.Bright >= movedBright && f.Bright <= 1-movedBright && math.Abs(f.Contrast) < movedContrast && f.Score < 2*minScore
}

// movedBright and movedContrast bound moved light (see movedLight).
const (
	movedBright   = 0.25
	movedContrast = 0.05
)

// colourless reports whether a track's medians f show no colour of their
// own in a picture whose water has colour: a shadow only darkens the water.
func colourless(f vision.Features) bool {
	return f.Water >= minWaterChroma && f.Chroma < shadowChroma
}

// minWaterChroma is how far from grey (Features.Water) the water must be
// for colour to tell light from a body: a night infrared picture is grey.
const minWaterChroma = 5

// lateAfter and lateArea: a track seen for longer than lateAfter before
// it may first alarm must show lateArea times the least body area at half
// contrast. A child getting in shows its whole body within seconds; a leaf
// (or two drifting together) measured about the least area for tens of
// seconds crosses it now and then by the noise of the measure. Measured
// on the whole tuning set: 15 of 21 false alarms were tracks seen for
// 0.8–120 s that raised at 0.030–0.035 m², 13 of them after more than 3 s;
// every child raised at 0.041 m² or more, and the only ones that took
// longer than 3 s to raise showed 0.084 m² or more. The development set's
// child H4 raised at 0.039 m², 0.7 s after its track began.
const (
	lateAfter = 3 * time.Second
	lateArea  = 1.35
)

// beyond reports whether at lies away from the camera behind a body seen
// on the deck at deck, within beyondAngle of the line from the point
// under the camera (nadir) through it: where the upright body standing
// there is seen on the plane. False when the nadir is not known.
func beyond(nadir *homography.Point, deck, at homography.Point) bool {
	if nadir == nil {
		return false
	}
	rx, ry := deck.X-nadir.X, deck.Y-nadir.Y
	ax, ay := at.X-deck.X, at.Y-deck.Y
	rn, an := math.Hypot(rx, ry), math.Hypot(ax, ay)
	if rn == 0 || an == 0 {
		return false
	}
	return (rx*ax+ry*ay)/(rn*an) >= math.Cos(beyondAngle*math.Pi/180)
}

// beyondAngle is how far, degrees, from the line away from the camera a
// track may lie and still be the upright body of someone on the deck:
// the body leans and the candidates' centres wander.
const beyondAngle = 30

// trailRadius is how far from where a track came over the edge a body on
// the deck is its own trail, m: the short mean holds the last second of a
// child walking in at up to 1 m/s (common practice for a toddler's walk,
// from memory), plus half a body.
const trailRadius = 1.2

// deckSelf is the distance, m, within which a body on the deck is the
// track's own: a child climbing in, whose centre crosses the edge back and
// forth.
const deckSelf = 0.7

// deckBodies returns the positions of this frame's candidates that are
// bodies on the deck (centre off the water, area at least min), and of
// those that are the trails of bodies that have left (less than
// presentMin of them still there: vision.Features.Present). A faint one
// counts too: someone walking on the deck beyond the watched ring shows
// only a weak edge of themselves in it.
func deckBodies(notes []candidateNote, min float64) (bodies, left []homography.Point) {
	for _, n := range notes {
		if !n.Outside || n.Features.Area < min || math.IsNaN(n.At.X) {
			continue
		}
		if n.Features.Present < presentMin {
			left = append(left, n.At)
			continue
		}
		bodies = append(bodies, n.At)
	}
	return bodies, left
}

// presentMin is the least share of a candidate on the deck that must be
// there in the current frame for it to be a body there (Features.Present):
// measured on tuning scene intruder/30, a child standing and walking on
// the deck 0.56–2, its trail in the short mean once it was in the water
// 0.17–0.32.
const presentMin = 0.4

// trackPresent is the least share of a track's latest candidate there
// in the current frame (Features.Present) for it to be let go by someone
// who has left the deck: a body that stays, or has just arrived, is
// there; the shadow of someone who walked away is leaving with them.
const trackPresent = 0.7

// leftFrames is in how many frames a trail must be seen near where a
// body was last seen on the deck for it to have left: someone who stood
// still and starts to walk away leaves a trail where they stood while
// they are still there.
const leftFrames = 3

// leftRadius is how near, m, a trail on the deck must be to a body
// remembered there to say it has left: the trail spans the last second
// of a walk.
const leftRadius = 0.6

// near reports whether p lies within r of any of ps.
func near(p homography.Point, ps []homography.Point, r float64) bool {
	for _, q := range ps {
		if p.Dist(q) <= r {
			return true
		}
	}
	return false
}

// judgeRulesOf returns the rules tracks are judged by.
// nadir is the point of the pool plane under the camera, nil when the
// camera's position is neither measured nor estimable.
func judgeRulesOf(d config.DetectConfig, nadir *homography.Point) judgeRules {
	return judgeRules{Nadir: nadir, MinArea: d.MinArea, MaxArea: d.MaxArea, MinScore: d.MinScore, MinTint: d.MinTint, MaxLength: d.MaxLength, MaxSpeed: d.MaxSpeed,
		DeckRadius: max(0, d.DeckRadius), Companion: max(0, d.Companion), DeckMemory: time.Second, DeckMinArea: d.MinArea}
}

// nadirOf returns the point of the pool plane under the camera, nil when
// the calibration does not place the camera.
func nadirOf(cal *homography.Calibration) *homography.Point {
	if cam, ok, _ := cal.Camera(); ok {
		return &homography.Point{X: cam.X, Y: cam.Y}
	}
	return nil
}
