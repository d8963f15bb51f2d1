package main

import (
	"fmt"
	"log/slog"
	"sort"
	"time"

	"stillwater/vision"
)

// judge decides which tracks of the rectified detector may raise an alarm,
// on what their candidates looked like over the last window of media time
// (the medians of their features), not on one frame: water makes
// candidates that pass any one test now and then.
type judge struct {
	window  time.Duration // size is judged over this much of the recent past
	memory  time.Duration // colour over this much: a shadow stays one
	rules   judgeRules
	tracks  map[int]*trackHistory
	log     *slog.Logger
	lastNow time.Duration
}

// judgeRules are the thresholds a track's evidence is held to.
type judgeRules struct {
	// MinArea and MaxArea bound the whole visible body, m².
	MinArea, MaxArea float64
	// ShadowChroma is the chromaticity distance (×100) under which a
	// candidate darker than the water is taken for a shadow: a shadow
	// dims the water and keeps its colour.
	ShadowChroma float64
	// MinWaterChroma is how far from grey (×100) the water's colour must
	// be for the shadow test to apply; a monochrome night picture has no
	// colour to tell by.
	MinWaterChroma float64
}

// trackHistory is one track's recent candidates.
type trackHistory struct {
	feats   []vision.Features
	times   []time.Duration
	raised  bool   // the track has raised an alarm: it stays eligible
	verdict string // the last reason it was not eligible, "" when it was
}

func newJudge(window time.Duration, rules judgeRules, log *slog.Logger) *judge {
	if window <= 0 {
		window = time.Second
	}
	return &judge{window: window, memory: max(window, judgeMemory), rules: rules, tracks: map[int]*trackHistory{}, log: log}
}

// observe records the candidates of the tracks seen at media time now and
// forgets tracks that are gone.
func (j *judge) observe(now time.Duration, tracks []vision.Track) {
	live := map[int]bool{}
	for _, t := range tracks {
		live[t.ID] = true
		if t.Last != now {
			continue
		}
		h := j.tracks[t.ID]
		if h == nil {
			h = &trackHistory{}
			j.tracks[t.ID] = h
		}
		h.feats = append(h.feats, t.Features)
		h.times = append(h.times, now)
		// Keep the memory, and at least the last candidate.
		cut := 0
		for cut < len(h.times)-1 && now-h.times[cut] > j.memory {
			cut++
		}
		h.feats, h.times = h.feats[cut:], h.times[cut:]
	}
	for id := range j.tracks {
		if !live[id] {
			delete(j.tracks, id)
		}
	}
	j.lastNow = now
}

// raised marks a track as having raised an alarm.
func (j *judge) raised(id int) {
	if h := j.tracks[id]; h != nil {
		h.raised = true
	}
}

// judgeMemory is how long a track's colour is remembered.
const judgeMemory = 10 * time.Second

// summary returns the medians of a track's features: colour and contrast
// over the judge's memory, the rest over its window.
func (j *judge) summary(id int) (vision.Features, int) {
	h := j.tracks[id]
	if h == nil || len(h.feats) == 0 {
		return vision.Features{}, 0
	}
	recent := 0
	for recent < len(h.times)-1 && h.times[len(h.times)-1]-h.times[recent] > j.window {
		recent++
	}
	long := func(get func(vision.Features) float64) float64 { return featureMedian(h.feats, get) }
	med := func(get func(vision.Features) float64) float64 { return featureMedian(h.feats[recent:], get) }
	return vision.Features{
		Area:     med(func(f vision.Features) float64 { return f.Area }),
		Core:     med(func(f vision.Features) float64 { return f.Core }),
		Score:    med(func(f vision.Features) float64 { return f.Score }),
		Peak:     med(func(f vision.Features) float64 { return f.Peak }),
		Contrast: long(func(f vision.Features) float64 { return f.Contrast }),
		Chroma:   long(func(f vision.Features) float64 { return f.Chroma }),
		Water:    long(func(f vision.Features) float64 { return f.Water }),
		Length:   med(func(f vision.Features) float64 { return f.Length }),
		Width:    med(func(f vision.Features) float64 { return f.Width }),
		Edge:     med(func(f vision.Features) float64 { return f.Edge }),
	}, len(h.feats) - recent
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
	f, _ := j.summary(id)
	r := j.rules
	why := ""
	switch {
	case f.Area < r.MinArea:
		why = fmt.Sprintf("smaller than a child's body (%.3f m² < %.3f m²)", f.Area, r.MinArea)
	case f.Area > r.MaxArea:
		why = fmt.Sprintf("larger than a person (%.3f m² > %.3f m²)", f.Area, r.MaxArea)
	case r.ShadowChroma > 0 && f.Contrast < 0 && f.Chroma < r.ShadowChroma && f.Water >= r.MinWaterChroma:
		why = fmt.Sprintf("a shadow: darker than the water (%.2f) in the water's own colour (chroma %.2f < %.2f)", f.Contrast, f.Chroma, r.ShadowChroma)
	}
	if why != h.verdict && j.log != nil {
		if why == "" {
			j.log.Debug("track eligible to alarm", append([]any{"track", id}, featureArgs(f)...)...)
		} else {
			j.log.Debug("track not eligible to alarm: "+why, append([]any{"track", id}, featureArgs(f)...)...)
		}
	}
	h.verdict = why
	return why == "", why
}
