package config

import (
	"flag"
	"fmt"
	"math"
	"time"

	"stillwater/alert"
	"stillwater/homography"
	"stillwater/vision"
)

// DetectConfig tunes detection and alarming for one camera.
type DetectConfig struct {
	// Method is meanvar (the rectified mean–variance detector) or one of
	// the earlier mixture models on the camera view, mog2 or knn.
	Method string `yaml:"method"`
	// Threshold is, for meanvar, the score a candidate's core must reach
	// (squared difference from the water under the local light over the
	// cell's own variance, summed over colour channels); for mog2 the
	// varThreshold, for knn the dist2Threshold.
	Threshold float64 `yaml:"threshold"`
	// Extent is the score that joins a cell to a candidate (meanvar).
	Extent float64 `yaml:"extent_threshold"`
	// Cell is the side of a cell of the rectified pool, m (meanvar).
	Cell float64 `yaml:"cell_m"`
	// ShortMean is the time constant of the frames' short mean (meanvar).
	ShortMean Duration `yaml:"short_mean"`
	// Learn is the time constant with which the background follows the
	// water (meanvar).
	Learn Duration `yaml:"learn"`
	// Noise is the standard deviation floor, grey levels (meanvar).
	Noise float64 `yaml:"noise"`
	// LightCell is the side, m, of the squares the light is measured on
	// (meanvar).
	LightCell float64 `yaml:"light_cell_m"`
	// Deck is how much of the deck around the water is watched, m
	// (meanvar): a body climbing in is seen whole, and reported once its
	// centre is over the water.
	Deck float64 `yaml:"deck_m"`
	// Smooth is the standard deviation, m, of the spatial blur of each
	// rectified frame (meanvar); negative is none.
	Smooth float64 `yaml:"smooth_m"`
	// MinScore is the least mean score over a candidate for it to alarm
	// (meanvar).
	MinScore float64 `yaml:"min_score"`
	// MinTint: brighter than the water and whiter than this is light on
	// the water, not a body (meanvar).
	MinTint float64 `yaml:"min_tint"`
	// MaxLength is the longest a candidate may be, m, to alarm (meanvar).
	MaxLength float64 `yaml:"max_length_m"`
	// MaxSpeed is the fastest, m/s, a track may move to start an alarm
	// (meanvar).
	MaxSpeed float64 `yaml:"max_speed_mps"`
	// DeckRadius: near someone on the deck, m, nothing on the water starts
	// an alarm (their shadow), until they are in the water (meanvar).
	DeckRadius float64 `yaml:"deck_radius_m"`
	// Companion: within this distance, m, of a target already raised, a
	// new track does not start a second alarm while that target lasts (the
	// body's shadow on the floor, its refracted legs, its wake); negative
	// is off (meanvar).
	Companion float64 `yaml:"companion_m"`
	// ProcessWidth and History set up mog2 and knn.
	ProcessWidth int      `yaml:"process_width"`
	History      int      `yaml:"history"`
	MinArea      float64  `yaml:"min_area_m2"`
	MaxArea      float64  `yaml:"max_area_m2"`
	Persist      Duration `yaml:"persist"`
	UpdateEvery  Duration `yaml:"update_every"`
	ClearAfter   Duration `yaml:"clear_after"`
}

// MinBodyArea is the smallest whole visible body, m² at half contrast,
// that may raise an alarm with the meanvar detector. Derivation from the
// WHO Child Growth Standards medians (12 months, the youngest and
// smallest child the alarm is for; girls, the smaller): length 74.0 cm,
// head circumference 44.9 cm, so a head 0.143 m across (circumference /
// π); shoulder breadth of 1–4 year olds about 0.22–0.26 m (from memory).
//
//   - Upright in the water, the head (a disc of π/4 · 0.143² = 0.016 m²)
//     and the shoulders and chest just under the surface, seen through
//     clear water (an ellipse 0.22 m × 0.20 m, π/4 · 0.22 · 0.20 =
//     0.035 m²), overlap to about 0.04 m² seen from straight above; an
//     oblique camera, which sees the body under the surface displaced
//     along its line of sight, sees more.
//   - Floating face down (the posture of a drowning), the body from above
//     is about length × shoulder breadth × π/4 = 0.74 · 0.22 · 0.785 =
//     0.13 m², and the generated and independent scenes label 0.11–0.18 m².
//
// The default, 0.03 m², sits under the smallest of these and above a
// floating leaf (0.003–0.02 m²); a bird resting on the water (up to
// 0.03 m²) can reach it. A candidate's area is measured where it differs from the
// water by at least half its peak contrast (Features.Half), close to its
// own outline; the looser outline blurring and the water's noise add
// around it is not counted.
const MinBodyArea = 0.03

// MinChildArea is the default smallest blob, m², of the mixture-model
// detectors (mog2, knn), which measure a blob's outline: the WHO median
// head circumference at 12 months (44.9 cm, girls) is a head 0.143 m
// across, a top-down disc of about 0.016 m²; the default sits below it, so
// that a one-year-old's head alone passes.
const MinChildArea = 0.012

// DefaultDetect returns the detection defaults.
func DefaultDetect() DetectConfig {
	a := alert.DefaultAlarm()
	mv := vision.DefaultMeanVar()
	return DetectConfig{
		Method:       "meanvar",
		Threshold:    mv.Threshold,
		Extent:       mv.Low,
		Cell:         defaultCell,
		ShortMean:    Duration(mv.Short),
		Learn:        Duration(mv.Learn),
		Noise:        mv.Noise,
		LightCell:    mv.LightCell,
		Smooth:       mv.Smooth,
		Deck:         defaultDeck,
		MinScore:     defaultMinScore,
		MinTint:      defaultMinTint,
		MaxLength:    defaultMaxLength,
		MaxSpeed:     defaultMaxSpeed,
		DeckRadius:   defaultDeckRadius,
		Companion:    defaultCompanion,
		ProcessWidth: 640,
		History:      500,
		MinArea:      MinBodyArea,
		MaxArea:      2.5,
		Persist:      Duration(a.Persist),
		UpdateEvery:  Duration(a.UpdateEvery),
		ClearAfter:   Duration(a.ClearAfter),
	}
}

// Defaults of the judge's rules (judge.go).
const (
	// defaultMinScore is fitted on the tuning seeds (see detect_fit.md):
	// the broad, faint changes a dying gust leaves score 30–40 over their
	// area, children 45 and more.
	defaultMinScore = 50
	// defaultMinTint: white light added to cyan water (glints, sky
	// reflections) has a tint near 0, sunlit glints on the scenario
	// suite's water 15–20; pale skin on the same water differs by about
	// (B −10, G +30, R +150) grey levels, tint 70 (derived).
	defaultMinTint = 30
	// defaultMaxLength: the longest body is a 48-month-old's (WHO median
	// height 103.3 cm) with an arm raised, about 1.5 m; 2 m allows for the
	// outline's blur. Cloud edges and ripple bands along lane lines run
	// across the pool.
	defaultMaxLength = 2.0
	// defaultMaxSpeed: an adult's shadow walking past moves at walking
	// pace, over 1 m/s (common practice: 1.2–1.5 m/s); a small child in the
	// water does not (from memory: well under 1 m/s).
	defaultMaxSpeed = 1.2
	// defaultDeckRadius: a shadow on the water beside someone at the edge.
	defaultDeckRadius = 2.5
	// defaultCompanion: a body floating in sunlit water casts a shadow on
	// the floor depth·tan(sun's zenith angle) away: 2.5 m holds for water
	// up to 1.8 m deep with the sun 36° or more up (derived), and an
	// oblique camera sees the submerged part of a body displaced towards
	// the floor. On the development set a floor shadow started its own
	// track 1.1 m and 2.05 m from a child already raised. A second child
	// that close is where the responder is already sent.
	defaultCompanion = 2.5
)

// defaultDeck is the deck watched around the water, m: a toddler on
// hands and knees at the edge (WHO median length at 12 months 74–76 cm)
// is seen whole.
const defaultDeck = 0.6

// defaultCell is the side of a cell of the rectified pool, m: a
// one-year-old's head (WHO median head circumference 44.9 cm, a diameter
// of 0.14 m) spans more than five cells.
const defaultCell = 0.025

// MergeDetect fills the zero fields of d from def.
func MergeDetect(def, d DetectConfig) DetectConfig {
	if d.ProcessWidth == 0 {
		d.ProcessWidth = def.ProcessWidth
	}
	if d.Method == "" {
		d.Method = def.Method
	}
	if d.History == 0 {
		d.History = def.History
	}
	if d.Threshold == 0 {
		switch {
		case d.Method == def.Method:
			d.Threshold = def.Threshold
		case d.Method == "knn":
			d.Threshold = 400 // OpenCV's default dist2Threshold
		default:
			d.Threshold = 16 // OpenCV's default varThreshold
		}
	}
	if d.Extent == 0 {
		d.Extent = def.Extent
	}
	if d.Cell == 0 {
		d.Cell = def.Cell
	}
	if d.ShortMean == 0 {
		d.ShortMean = def.ShortMean
	}
	if d.Learn == 0 {
		d.Learn = def.Learn
	}
	if d.Noise == 0 {
		d.Noise = def.Noise
	}
	if d.LightCell == 0 {
		d.LightCell = def.LightCell
	}
	if d.Deck == 0 {
		d.Deck = def.Deck
	}
	if d.Smooth == 0 {
		d.Smooth = def.Smooth
	}
	if d.MinScore == 0 {
		d.MinScore = def.MinScore
	}
	if d.MinTint == 0 {
		d.MinTint = def.MinTint
	}
	if d.MaxLength == 0 {
		d.MaxLength = def.MaxLength
	}
	if d.MaxSpeed == 0 {
		d.MaxSpeed = def.MaxSpeed
	}
	if d.DeckRadius == 0 {
		d.DeckRadius = def.DeckRadius
	}
	if d.Companion == 0 {
		d.Companion = def.Companion
	}
	if d.MinArea == 0 {
		d.MinArea = def.MinArea
		if d.Method != def.Method {
			d.MinArea = MinChildArea
		}
	}
	if d.MaxArea == 0 {
		d.MaxArea = def.MaxArea
	}
	if d.Persist == 0 {
		d.Persist = def.Persist
	}
	if d.UpdateEvery == 0 {
		d.UpdateEvery = def.UpdateEvery
	}
	if d.ClearAfter == 0 {
		d.ClearAfter = def.ClearAfter
	}
	return d
}

// ValidateDetect checks a camera's detect section; where names the camera.
func ValidateDetect(where string, d DetectConfig) error {
	switch d.Method {
	case "meanvar", "mog2", "knn":
	default:
		return fmt.Errorf("%s.detect.method: %q; want meanvar, mog2 or knn", where, d.Method)
	}
	if d.Method == "meanvar" {
		switch {
		case !(d.Cell >= 0.005 && d.Cell <= 0.2):
			return fmt.Errorf("%s.detect.cell_m: %g; want 0.005–0.2 m (0.025 is typical)", where, d.Cell)
		case d.Extent <= 0 || d.Extent > d.Threshold:
			return fmt.Errorf("%s.detect: extent_threshold %g and threshold %g; want 0 < extent_threshold ≤ threshold", where, d.Extent, d.Threshold)
		case d.ShortMean <= 0 || d.Learn <= d.ShortMean:
			return fmt.Errorf("%s.detect: short_mean %v and learn %v; want 0 < short_mean < learn", where, time.Duration(d.ShortMean), time.Duration(d.Learn))
		case d.Noise <= 0:
			return fmt.Errorf("%s.detect.noise: %g; want a positive number of grey levels", where, d.Noise)
		case d.LightCell < 4*d.Cell:
			return fmt.Errorf("%s.detect.light_cell_m: %g; want at least four cells (%g m)", where, d.LightCell, 4*d.Cell)
		}
	}
	if d.ProcessWidth < 80 {
		return fmt.Errorf("%s.detect.process_width: %d; want at least 80 px (640 is typical)", where, d.ProcessWidth)
	}
	if d.History < 1 {
		return fmt.Errorf("%s.detect.history: %d; want a positive number of frames", where, d.History)
	}
	if d.Threshold < 0 {
		return fmt.Errorf("%s.detect.threshold: %g; want a positive value", where, d.Threshold)
	}
	if d.MinArea < 0 || d.MaxArea <= d.MinArea {
		return fmt.Errorf("%s.detect: min_area_m2 %g and max_area_m2 %g; want 0 ≤ min < max", where, d.MinArea, d.MaxArea)
	}
	if d.Persist < 0 || d.UpdateEvery <= 0 || d.ClearAfter <= 0 {
		return fmt.Errorf("%s.detect: persist, update_every and clear_after must be positive durations", where)
	}
	return nil
}

// ZoneConfig is one exclusion polygon under a camera (a ladder, a fountain,
// the cleaner's dock): blobs whose centre falls inside never track or
// alarm. Give the outline either in pool metres (origin at corner A, x along
// the length) or in source pixels (origin top-left, y down), not both.
type ZoneConfig struct {
	Name   string       `yaml:"name"`
	PoolM  [][2]float64 `yaml:"pool_m"`
	Pixels [][2]float64 `yaml:"pixels"`
}

// zoneMargin is how far, m, a zone's corner may reach beyond the water's
// edge (a ladder's handrails stand on the coping).
const zoneMargin = 0.5

// ValidateZones checks a camera's zones against its calibration; where
// names the camera.
func ValidateZones(where string, cam CameraConfig, cal *homography.Calibration) error {
	if len(cam.Zones) == 0 {
		return nil
	}
	names := map[string]bool{}
	for i, z := range cam.Zones {
		at := fmt.Sprintf("%s.zones[%d]", where, i)
		if z.Name != "" {
			at = fmt.Sprintf("%s (%s)", at, z.Name)
			if names[z.Name] {
				return fmt.Errorf("%s.name: %q is used twice; zone names must be unique", at, z.Name)
			}
			names[z.Name] = true
		}
		var pts [][2]float64
		var field string
		switch {
		case len(z.PoolM) > 0 && len(z.Pixels) > 0:
			return fmt.Errorf("%s: both pool_m and pixels given; outline the zone in one frame only", at)
		case len(z.PoolM) > 0:
			pts, field = z.PoolM, "pool_m"
		case len(z.Pixels) > 0:
			pts, field = z.Pixels, "pixels"
		default:
			return fmt.Errorf("%s: no outline; give pool_m: [[x,y],...] in metres or pixels: [[u,v],...]", at)
		}
		if len(pts) < 3 {
			return fmt.Errorf("%s.%s: %d points; a zone needs at least 3", at, field, len(pts))
		}
		if i, j, ok := selfIntersection(pts); ok {
			return fmt.Errorf("%s.%s: edges %d and %d cross; list the points in order around the outline", at, field, i, j)
		}
		if math.Abs(shoelace(pts)) < 1e-9 {
			return fmt.Errorf("%s.%s: the outline has no area", at, field)
		}
		L, W := cam.Pool.Length, cam.Pool.Width
		for k, p := range pts {
			q := homography.Point{X: p[0], Y: p[1]}
			if field == "pixels" {
				m, ok := cal.Surface(q)
				if !ok {
					return fmt.Errorf("%s.pixels[%d]: (%g, %g) does not map onto the pool plane (above the horizon?)", at, k, p[0], p[1])
				}
				q = m
			}
			if cal.Outline() == nil && (q.X < -zoneMargin || q.Y < -zoneMargin || q.X > L+zoneMargin || q.Y > W+zoneMargin) {
				return fmt.Errorf("%s.%s[%d]: (%g, %g) lies at (%.2f, %.2f) m, outside the %gx%g m pool (more than %g m beyond its edge)",
					at, field, k, p[0], p[1], q.X, q.Y, L, W, zoneMargin)
			}
		}
	}
	return nil
}

// shoelace returns twice the signed area of a polygon.
func shoelace(pts [][2]float64) float64 {
	var a float64
	for i := range pts {
		j := (i + 1) % len(pts)
		a += pts[i][0]*pts[j][1] - pts[j][0]*pts[i][1]
	}
	return a
}

// selfIntersection returns the first pair of non-adjacent edges of the
// closed polygon that touch or cross (edge k runs from point k to k+1).
func selfIntersection(pts [][2]float64) (int, int, bool) {
	n := len(pts)
	for i := 0; i < n; i++ {
		a, b := pts[i], pts[(i+1)%n]
		for j := i + 1; j < n; j++ {
			if j == i+1 || (i == 0 && j == n-1) {
				continue // adjacent edges share a corner
			}
			c, d := pts[j], pts[(j+1)%n]
			if segmentsMeet(a, b, c, d) {
				return i, j, true
			}
		}
	}
	return 0, 0, false
}

// segmentsMeet reports whether segments ab and cd share a point (the
// orientation test with the collinear cases).
func segmentsMeet(a, b, c, d [2]float64) bool {
	o := func(p, q, r [2]float64) float64 {
		return (q[0]-p[0])*(r[1]-p[1]) - (q[1]-p[1])*(r[0]-p[0])
	}
	on := func(p, q, r [2]float64) bool {
		return math.Min(p[0], q[0]) <= r[0] && r[0] <= math.Max(p[0], q[0]) &&
			math.Min(p[1], q[1]) <= r[1] && r[1] <= math.Max(p[1], q[1])
	}
	d1, d2, d3, d4 := o(c, d, a), o(c, d, b), o(a, b, c), o(a, b, d)
	if ((d1 > 0 && d2 < 0) || (d1 < 0 && d2 > 0)) && ((d3 > 0 && d4 < 0) || (d3 < 0 && d4 > 0)) {
		return true
	}
	return (d1 == 0 && on(c, d, a)) || (d2 == 0 && on(c, d, b)) || (d3 == 0 && on(a, b, c)) || (d4 == 0 && on(a, b, d))
}

// DetectOverrides are the detect settings a replay or sweep may set from
// flags; zero values keep the camera's own.
type DetectOverrides struct {
	Threshold float64
	MinArea   float64
	Persist   time.Duration
	MinScore  float64
}

// Register adds the override flags to fs.
func (o *DetectOverrides) Register(fs *flag.FlagSet) {
	fs.Float64Var(&o.Threshold, "threshold", 0, "background model `threshold` (0: the camera's)")
	fs.Float64Var(&o.MinArea, "min-area", 0, "smallest blob in `m²` that may alarm (0: the camera's)")
	fs.DurationVar(&o.Persist, "persist", 0, "how long a track must last before it alarms (0: the camera's)")
	fs.Float64Var(&o.MinScore, "min-score", 0, "least mean `score` over a candidate that may alarm, meanvar (0: the camera's)")
}

// Validate rejects negative overrides.
func (o DetectOverrides) Validate() error {
	switch {
	case o.Threshold < 0:
		return fmt.Errorf("-threshold %g: want a positive value", o.Threshold)
	case o.MinArea < 0:
		return fmt.Errorf("-min-area %g: want a positive area in m²", o.MinArea)
	case o.MinScore < 0:
		return fmt.Errorf("-min-score %g: want a positive score", o.MinScore)
	case o.Persist < 0:
		return fmt.Errorf("-persist %v: want a positive duration such as 700ms", o.Persist)
	}
	return nil
}

// Apply returns d with the overrides that are set.
func (o DetectOverrides) Apply(d DetectConfig) DetectConfig {
	if o.Threshold > 0 {
		d.Threshold = o.Threshold
	}
	if o.MinArea > 0 {
		d.MinArea = o.MinArea
	}
	if o.Persist > 0 {
		d.Persist = Duration(o.Persist)
	}
	if o.MinScore > 0 {
		d.MinScore = o.MinScore
	}
	return d
}

// DetectLine is check's summary of a camera's detect section.
func DetectLine(d DetectConfig) string {
	alarm := fmt.Sprintf("alarm after %v, updates every %v, cleared after %v", time.Duration(d.Persist), time.Duration(d.UpdateEvery), time.Duration(d.ClearAfter))
	if d.Method != "meanvar" {
		return fmt.Sprintf("detect %s at %d px wide, threshold %g, blobs %g–%g m², %s", d.Method, d.ProcessWidth, d.Threshold, d.MinArea, d.MaxArea, alarm)
	}
	return fmt.Sprintf("detect meanvar on %g cm cells of the pool and %g m of deck, threshold %g (extent %g, mean %g), bodies %g–%g m² up to %g m long and %g m/s, %s",
		100*d.Cell, max(0, d.Deck), d.Threshold, d.Extent, d.MinScore, d.MinArea, d.MaxArea, d.MaxLength, d.MaxSpeed, alarm)
}
