// Package track follows detections across frames by nearest neighbour in
// the plane the caller places them on (stillwater uses pool metres: origin
// at corner A, x along the length). It does no image processing and
// imports no OpenCV; the detector's measurements ride along as F.
package track

import (
	"image"
	"math"
	"sort"
	"time"
)

// Detection is one blob placed on the pool plane by the caller. X and Y are
// in the caller's plane units (stillwater uses pool metres).
type Detection[F any] struct {
	X, Y float64
	Area float64         // plane units²
	Box  image.Rectangle // source pixels
	// Hold is the box to keep out of background learning while the object
	// is tracked, in the detector's own pixels (grid cells for meanvar).
	Hold image.Rectangle
	// Features are the detector's measurements of the largest part, and
	// FeatureArea that part's area (plane units²; 0 without measurements):
	// when detections merge, the largest part's Features are kept.
	Features    F
	FeatureArea float64
}

// Track is an object followed across frames, in plane units.
type Track[F any] struct {
	ID          int
	X, Y        float64
	VX, VY      float64 // units per second
	Area        float64
	Box         image.Rectangle // source pixels, latest
	Hold        image.Rectangle // detector pixels, latest (see Detection.Hold)
	Features    F               // latest
	First, Last time.Duration   // media time first and last seen
	Hits        int             // frames with a detection
	// RunStart and RunHits are the start and the detections of the
	// track's current run: seen without a gap longer than TrackerConfig.
	// RunGap. Water chains short-lived blobs into sparse tracks that a body
	// may later join; its persistence counts from its own run.
	RunStart time.Duration
	RunHits  int
}

// TrackerConfig tunes association.
type TrackerConfig[F any] struct {
	// Gate is the largest distance from a track's predicted position at
	// which a detection is still the same object (plane units).
	Gate float64
	// MergeRadius joins detections closer than this into one object before
	// association, so that arms and splashes stay with their body.
	MergeRadius float64
	// MaxMissing is how long a track survives without a detection.
	MaxMissing time.Duration
	// RunGap is the longest gap within a run (Track.RunStart); zero
	// selects 300 ms.
	RunGap time.Duration
	// Drift is how fast, plane units per second, a track's predicted
	// position loses its worth once its run has ended (unseen for longer
	// than RunGap): where tracks compete for a detection, each pair is
	// ranked by its distance plus Drift times the time unseen beyond
	// RunGap, so a track in its run keeps its object before one that was
	// last seen there a second ago. Tracks within their runs, as a body
	// seen in flickering pieces is, rank by distance alone, and the gate is
	// unchanged. Zero ranks every pair by distance alone.
	Drift float64
	// Penalty, when set, adds to the rank of pairing track t with the
	// (merged) detection d, plane units: what the caller knows of the two
	// beyond where they are. It orders a track's detections among
	// themselves (the least penalty among them counts as none), and the
	// gate still applies to the distance alone.
	Penalty func(t *Track[F], d Detection[F]) float64
}

// Tracker associates detections across frames by nearest neighbour within
// a gate. Not safe for concurrent use.
type Tracker[F any] struct {
	cfg    TrackerConfig[F]
	next   int
	tracks []*Track[F]
	last   time.Duration
}

// NewTracker returns an empty tracker.
func NewTracker[F any](cfg TrackerConfig[F]) *Tracker[F] {
	if cfg.Gate <= 0 {
		cfg.Gate = 1.0
	}
	if cfg.MergeRadius < 0 {
		cfg.MergeRadius = 0
	}
	if cfg.MaxMissing <= 0 {
		cfg.MaxMissing = 2 * time.Second
	}
	if cfg.RunGap <= 0 {
		cfg.RunGap = 300 * time.Millisecond
	}
	return &Tracker[F]{cfg: cfg, next: 1}
}

// Update feeds the detections of the frame at media time now and returns
// the live tracks: those seen in this frame first, then those kept alive
// without a detection, each group ordered by id.
func (t *Tracker[F]) Update(now time.Duration, dets []Detection[F]) []Track[F] {
	groups := mergeDetections(dets, t.cfg.MergeRadius)
	type pair struct {
		ti, gi int
		rank   float64 // distance, plus Drift × time unseen beyond RunGap
	}
	var pairs []pair
	for ti, tr := range t.tracks {
		dt := (now - tr.Last).Seconds()
		px, py := tr.X+tr.VX*dt, tr.Y+tr.VY*dt
		first := len(pairs)
		least := math.Inf(1)
		for gi, g := range groups {
			d := math.Hypot(g.X-px, g.Y-py)
			if d <= t.cfg.Gate {
				rank := d + t.cfg.Drift*math.Max(0, dt-t.cfg.RunGap.Seconds())
				if t.cfg.Penalty != nil {
					pen := t.cfg.Penalty(tr, g)
					rank += pen
					least = math.Min(least, pen)
				}
				pairs = append(pairs, pair{ti, gi, rank})
			}
		}
		// The penalty orders a track's detections among themselves: the
		// least of them is taken off, so that a track whose detections
		// all carry one does not yield them to other tracks.
		if !math.IsInf(least, 1) {
			for i := first; i < len(pairs); i++ {
				pairs[i].rank -= least
			}
		}
	}
	sort.Slice(pairs, func(i, j int) bool { return pairs[i].rank < pairs[j].rank })
	usedT := make([]bool, len(t.tracks))
	usedG := make([]bool, len(groups))
	for _, p := range pairs {
		if usedT[p.ti] || usedG[p.gi] {
			continue
		}
		usedT[p.ti], usedG[p.gi] = true, true
		tr, g := t.tracks[p.ti], groups[p.gi]
		if dt := (now - tr.Last).Seconds(); dt > 0 {
			const a = 0.3
			tr.VX = (1-a)*tr.VX + a*(g.X-tr.X)/dt
			tr.VY = (1-a)*tr.VY + a*(g.Y-tr.Y)/dt
		}
		tr.X, tr.Y, tr.Area, tr.Box, tr.Hold, tr.Features = g.X, g.Y, g.Area, g.Box, g.Hold, g.Features
		if now-tr.Last > t.cfg.RunGap {
			tr.RunStart, tr.RunHits = now, 0
		}
		tr.Last = now
		tr.Hits++
		tr.RunHits++
	}
	for gi, g := range groups {
		if usedG[gi] {
			continue
		}
		t.tracks = append(t.tracks, &Track[F]{ID: t.next, X: g.X, Y: g.Y, Area: g.Area, Box: g.Box, Hold: g.Hold, Features: g.Features, First: now, Last: now, Hits: 1, RunStart: now, RunHits: 1})
		t.next++
	}
	keep := t.tracks[:0]
	for _, tr := range t.tracks {
		if now-tr.Last <= t.cfg.MaxMissing {
			keep = append(keep, tr)
		}
	}
	t.tracks = keep
	t.last = now
	// t.tracks is in id order; those seen now go first, in a stable
	// partition.
	out := make([]Track[F], 0, len(t.tracks))
	for _, tr := range t.tracks {
		if tr.Last == now {
			out = append(out, *tr)
		}
	}
	for _, tr := range t.tracks {
		if tr.Last != now {
			out = append(out, *tr)
		}
	}
	return out
}

// Now returns the media time of the last Update.
func (t *Tracker[F]) Now() time.Duration { return t.last }

// Reset forgets every track (after the model was rebuilt or the camera
// moved); ids keep counting up.
func (t *Tracker[F]) Reset() { t.tracks = nil }

// mergeDetections joins detections closer than r (single linkage) into one,
// with the area-weighted centre, summed area and the union box.
func mergeDetections[F any](dets []Detection[F], r float64) []Detection[F] {
	n := len(dets)
	parent := make([]int, n)
	for i := range parent {
		parent[i] = i
	}
	var find func(int) int
	find = func(i int) int {
		for parent[i] != i {
			parent[i] = parent[parent[i]]
			i = parent[i]
		}
		return i
	}
	for i := 0; i < n; i++ {
		for j := i + 1; j < n; j++ {
			if math.Hypot(dets[i].X-dets[j].X, dets[i].Y-dets[j].Y) <= r {
				parent[find(i)] = find(j)
			}
		}
	}
	idx := map[int]int{}
	var out []Detection[F]
	var wsum []float64
	for i, d := range dets {
		root := find(i)
		k, ok := idx[root]
		if !ok {
			k = len(out)
			idx[root] = k
			out = append(out, Detection[F]{Box: d.Box, Hold: d.Hold})
			wsum = append(wsum, 0)
		}
		w := math.Max(d.Area, 1e-9)
		o := &out[k]
		o.X += d.X * w
		o.Y += d.Y * w
		o.Area += d.Area
		o.Box = o.Box.Union(d.Box)
		o.Hold = o.Hold.Union(d.Hold)
		if d.FeatureArea >= o.FeatureArea {
			o.Features, o.FeatureArea = d.Features, d.FeatureArea
		}
		wsum[k] += w
	}
	for k := range out {
		out[k].X /= wsum[k]
		out[k].Y /= wsum[k]
	}
	return out
}
