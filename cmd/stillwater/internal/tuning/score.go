package tuning

import (
	"encoding/json"
	"fmt"
	"io"
	"math"
	"os"
	"sort"
	"text/tabwriter"
	"time"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/vision/synth"
)

// scoreRules say how replay messages are matched to the labels.
type scoreRules struct {
	// Grace is how long after a presence interval ends a target still
	// belongs to it (the alarm reports what it saw a moment ago).
	Grace time.Duration
	// FarM is the distance, m, beyond which a target's first position is
	// not the labelled intruder: its track is a false alarm.
	FarM float64
	// MaxGap is the longest silence between two targets of one track that
	// still counts as tracked without a break (twice the default 0.5 s
	// update interval).
	MaxGap time.Duration
}

// DefaultScoreRules are the scoring rules of the score command.
func DefaultScoreRules() scoreRules {
	return scoreRules{Grace: time.Second, FarM: 1.0, MaxGap: time.Second}
}

// ClipScore is the result for one clip. Times are seconds of media time.
type ClipScore struct {
	Name      string
	Duration  float64 // s of footage
	FreeHours float64 // hours of intruder-free footage
	Presences int
	Detected  int       // presence intervals with a target
	Delays    []float64 // s from entry to the first target, per detected interval
	False     int       // target tracks not explained by an intruder
	Errors    []float64 // m, per target message with a labelled position
	// Misses are the same target messages with where each was and where
	// the label put the intruder, for breaking the errors down.
	Misses []PositionMiss
	Breaks int // extra track ids and clears during presence intervals
	// Tracked is the longest time, s, one track kept reporting an intruder
	// with no silence longer than MaxGap.
	Tracked float64
	// Picture faults: the labelled fault intervals; how many of them
	// raised their fault while the fault was on, and how long after its
	// onset, s; picture faults raised at other times or of another kind;
	// and target tracks started while a labelled fault was on.
	FaultsLabelled int
	FaultsRaised   int
	FaultDelays    []float64
	FalseFaults    int
	FaultTargets   int
	// FaultBreaks counts picture faults, once raised, cleared while their
	// labelled fault was still on: the camera called fine while it was not.
	FaultBreaks int
	// FaultKinds and FaultEach are the labelled faults in label order:
	// the fault each should raise, and its delay, s (NaN when never).
	FaultKinds []string
	FaultEach  []float64
}

// PositionMiss is one target message scored for position: its frame,
// media time (s) and track, the surface position it reported and the
// labelled one (pool metres), and the distance between them, m.
type PositionMiss struct {
	Frame     int
	Media     float64
	Track     int
	At, Label [2]float64
	Err       float64
}

// FaultKindOf returns the fault a labelled camera fault should raise:
// black → camera_blinded, frozen → camera_frozen, noise → camera_noise (a
// fault kind itself is taken as it is).
func FaultKindOf(label string) (string, error) {
	switch label {
	case synth.FaultBlack:
		return alert.FaultCameraBlinded, nil
	case synth.FaultFrozen:
		return alert.FaultCameraFrozen, nil
	case synth.FaultNoise:
		return alert.FaultCameraNoise, nil
	}
	if pipeline.IsPictureFault(label) {
		return label, nil
	}
	return "", fmt.Errorf("labelled fault %q: want black, frozen, noise or a picture fault kind", label)
}

// missed returns the number of presence intervals without a target.
func (c ClipScore) missed() int { return c.Presences - c.Detected }

// scoreClip scores one replay against its labels.
func scoreClip(name string, lines []ReplayLine, t synth.Truth, rules scoreRules) (ClipScore, error) {
	cs := ClipScore{Name: name, Presences: len(t.Presence), FaultsLabelled: len(t.Faults)}
	if t.Frames <= 0 {
		return cs, fmt.Errorf("score %s: labels give no frame count; set \"frames\" to the clip's number of frames", name)
	}
	faultKinds := make([]string, len(t.Faults))
	for i, f := range t.Faults {
		k, err := FaultKindOf(f.Kind)
		if err != nil {
			return cs, fmt.Errorf("score %s: %w", name, err)
		}
		faultKinds[i] = k
	}
	// inFault returns the labelled fault on at media time s, of the given
	// kind unless kind is empty; -1 for none.
	inFault := func(s float64, kind string) int {
		for i, f := range t.Faults {
			if s >= f.From && s <= f.To && (kind == "" || kind == faultKinds[i]) {
				return i
			}
		}
		return -1
	}
	faultAt := make([]float64, len(t.Faults))
	for i := range faultAt {
		faultAt[i] = math.NaN()
	}
	cs.Duration = float64(t.Frames) / t.FPS
	free := cs.Duration
	for _, p := range t.Presence {
		free -= math.Min(p.To, cs.Duration) - p.From
	}
	cs.FreeHours = math.Max(0, free) / 3600
	grace := rules.Grace.Seconds()
	during := func(s float64) int {
		for i, p := range t.Presence {
			if s >= p.From && s < p.To+grace {
				return i
			}
		}
		return -1
	}
	truthAt := func(frame int) *synth.Occupation {
		if frame < 0 || frame >= len(t.PerFrame) || t.PerFrame[frame].Frame != frame {
			return nil
		}
		return t.PerFrame[frame].Intruder
	}
	// A track is judged at its start: false when no intruder is present, or
	// when the labelled intruder is farther than FarM.
	falseTrack := map[int]bool{}
	first := make([]float64, len(t.Presence))
	for i := range first {
		first[i] = math.NaN()
	}
	type run struct {
		track       int
		from, until float64
	}
	// One run per track: another track reporting meanwhile does not end it.
	runs := make([]map[int]*run, len(t.Presence))
	for i := range runs {
		runs[i] = map[int]*run{}
	}
	ids := make([]map[int]bool, len(t.Presence))
	for i := range ids {
		ids[i] = map[int]bool{}
	}
	for n, l := range lines {
		var k struct {
			Kind string `json:"kind"`
		}
		if err := json.Unmarshal(l.Msg, &k); err != nil {
			return cs, fmt.Errorf("score %s: line %d: %w", name, n+1, err)
		}
		switch k.Kind {
		case alert.KindTarget:
			var tg alert.Target
			if err := json.Unmarshal(l.Msg, &tg); err != nil {
				return cs, fmt.Errorf("score %s: line %d: %w", name, n+1, err)
			}
			pi := during(l.Media)
			occ := truthAt(l.Frame)
			if tg.Event == "start" && inFault(l.Media, "") >= 0 {
				cs.FaultTargets++
			}
			if tg.Event == "start" {
				far := occ != nil && math.Hypot(tg.Surface.X-occ.X, tg.Surface.Y-occ.Y) > rules.FarM
				if pi < 0 || far {
					falseTrack[tg.Track] = true
					cs.False++
					continue
				}
			}
			if falseTrack[tg.Track] || pi < 0 {
				continue
			}
			if math.IsNaN(first[pi]) {
				first[pi] = l.Media
			}
			r := runs[pi][tg.Track]
			if r == nil || l.Media-r.until > rules.MaxGap.Seconds() {
				r = &run{tg.Track, l.Media, l.Media}
				runs[pi][tg.Track] = r
			} else {
				r.until = l.Media
			}
			cs.Tracked = math.Max(cs.Tracked, r.until-r.from)
			ids[pi][tg.Track] = true
			if occ != nil {
				e := math.Hypot(tg.Surface.X-occ.X, tg.Surface.Y-occ.Y)
				cs.Errors = append(cs.Errors, e)
				cs.Misses = append(cs.Misses, PositionMiss{Frame: l.Frame, Media: l.Media, Track: tg.Track,
					At: [2]float64{tg.Surface.X, tg.Surface.Y}, Label: [2]float64{occ.X, occ.Y}, Err: e})
			}
		case alert.KindFault:
			var f alert.Fault
			if err := json.Unmarshal(l.Msg, &f); err != nil {
				return cs, fmt.Errorf("score %s: line %d: %w", name, n+1, err)
			}
			if !pipeline.IsPictureFault(f.Fault) {
				continue // a fault the picture checks do not raise
			}
			i := inFault(l.Media, f.Fault)
			switch {
			case !f.Active:
				// Cleared while its labelled fault is still on, after it
				// was raised.
				if i >= 0 && !math.IsNaN(faultAt[i]) {
					cs.FaultBreaks++
				}
			case i >= 0:
				if math.IsNaN(faultAt[i]) {
					faultAt[i] = l.Media
				}
			default:
				cs.FalseFaults++
			}
		case alert.KindCleared:
			var c alert.Cleared
			if err := json.Unmarshal(l.Msg, &c); err != nil {
				return cs, fmt.Errorf("score %s: line %d: %w", name, n+1, err)
			}
			for _, p := range t.Presence {
				// A clear while the intruder is still in the water.
				if l.Media >= p.From && l.Media < p.To && !falseTrack[c.Track] {
					cs.Breaks++
				}
			}
		}
	}
	cs.FaultKinds = faultKinds
	for i, f := range t.Faults {
		cs.FaultEach = append(cs.FaultEach, faultAt[i]-f.From)
		if !math.IsNaN(faultAt[i]) {
			cs.FaultsRaised++
			cs.FaultDelays = append(cs.FaultDelays, faultAt[i]-f.From)
		}
	}
	for i, p := range t.Presence {
		if !math.IsNaN(first[i]) {
			cs.Detected++
			cs.Delays = append(cs.Delays, first[i]-p.From)
		}
		if len(ids[i]) > 1 {
			cs.Breaks += len(ids[i]) - 1
		}
	}
	return cs, nil
}

// scoreTotal pools clip scores.
type scoreTotal struct {
	Clips, Presences, Detected, False, Breaks int
	FreeHours                                 float64
	Delays, Errors                            []float64
	// Picture faults, as in clipScore.
	FaultsLabelled, FaultsRaised, FalseFaults, FaultTargets, FaultBreaks int
	FaultDelays                                                          []float64
}

// TotalOf sums the scores of clips.
func TotalOf(cs []ClipScore) scoreTotal {
	var t scoreTotal
	for _, c := range cs {
		t.Clips++
		t.Presences += c.Presences
		t.Detected += c.Detected
		t.False += c.False
		t.Breaks += c.Breaks
		t.FreeHours += c.FreeHours
		t.Delays = append(t.Delays, c.Delays...)
		t.Errors = append(t.Errors, c.Errors...)
		t.FaultsLabelled += c.FaultsLabelled
		t.FaultsRaised += c.FaultsRaised
		t.FalseFaults += c.FalseFaults
		t.FaultTargets += c.FaultTargets
		t.FaultBreaks += c.FaultBreaks
		t.FaultDelays = append(t.FaultDelays, c.FaultDelays...)
	}
	return t
}

// falsePerHour is false alarms per hour of intruder-free footage; NaN
// without such footage.
func (t scoreTotal) falsePerHour() float64 {
	if t.FreeHours == 0 {
		return math.NaN()
	}
	return float64(t.False) / t.FreeHours
}

// Quantile returns the q-quantile of v by linear interpolation between
// order statistics (NaN for none).
func Quantile(v []float64, q float64) float64 {
	if len(v) == 0 {
		return math.NaN()
	}
	s := append([]float64(nil), v...)
	sort.Float64s(s)
	pos := q * float64(len(s)-1)
	lo := int(math.Floor(pos))
	hi := int(math.Ceil(pos))
	return s[lo] + (pos-float64(lo))*(s[hi]-s[lo])
}

// MaxOf returns the largest of v, NaN for none.
func MaxOf(v []float64) float64 {
	m := math.NaN()
	for _, x := range v {
		if math.IsNaN(m) || x > m {
			m = x
		}
	}
	return m
}

// ScoreLimits turn a score into pass or fail; negative fields are unset.
type ScoreLimits struct {
	MaxDelay  time.Duration // worst first-alert delay
	MaxFalse  int           // false alarms in total
	MaxP95    float64       // m, 95th percentile position error
	MaxBreaks int
	// MaxFaultDelay is the longest a labelled picture fault may take to be
	// raised; when set, a fault never raised fails too.
	MaxFaultDelay time.Duration
	// MaxFalseFaults are picture faults raised with none labelled.
	MaxFalseFaults int
	// MaxFaultTargets are target tracks started while a fault was on.
	MaxFaultTargets int
}

// Check returns one line per broken limit.
func (l ScoreLimits) Check(t scoreTotal) []string {
	var out []string
	if t.Detected < t.Presences {
		out = append(out, fmt.Sprintf("%d of %d intruder presences never raised a target", t.Presences-t.Detected, t.Presences))
	}
	if l.MaxDelay >= 0 {
		if d := MaxOf(t.Delays); d > l.MaxDelay.Seconds() {
			out = append(out, fmt.Sprintf("worst first-alert delay %.2f s exceeds %v", d, l.MaxDelay))
		}
	}
	if l.MaxFalse >= 0 && t.False > l.MaxFalse {
		out = append(out, fmt.Sprintf("%d false alarms exceed %d", t.False, l.MaxFalse))
	}
	if l.MaxP95 >= 0 {
		if p := Quantile(t.Errors, 0.95); p > l.MaxP95 {
			out = append(out, fmt.Sprintf("p95 position error %.3f m exceeds %g m", p, l.MaxP95))
		}
	}
	if l.MaxBreaks >= 0 && t.Breaks > l.MaxBreaks {
		out = append(out, fmt.Sprintf("%d track breaks exceed %d", t.Breaks, l.MaxBreaks))
	}
	if l.MaxFaultDelay >= 0 {
		if t.FaultsRaised < t.FaultsLabelled {
			out = append(out, fmt.Sprintf("%d of %d labelled picture faults never raised their fault", t.FaultsLabelled-t.FaultsRaised, t.FaultsLabelled))
		}
		if d := MaxOf(t.FaultDelays); d > l.MaxFaultDelay.Seconds() {
			out = append(out, fmt.Sprintf("worst picture-fault delay %.2f s exceeds %v", d, l.MaxFaultDelay))
		}
	}
	if l.MaxFalseFaults >= 0 && t.FalseFaults > l.MaxFalseFaults {
		out = append(out, fmt.Sprintf("%d picture faults raised with none labelled exceed %d", t.FalseFaults, l.MaxFalseFaults))
	}
	if l.MaxFaultTargets >= 0 && t.FaultTargets > l.MaxFaultTargets {
		out = append(out, fmt.Sprintf("%d targets raised during a picture fault exceed %d", t.FaultTargets, l.MaxFaultTargets))
	}
	return out
}

// WriteScores prints the per-clip table and the total.
func WriteScores(w io.Writer, cs []ClipScore) {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "clip\tfootage s\tdetected\tdelay s\tfalse\tfalse/h\terr med m\terr p95 m\tbreaks\tfaults\tfault s\tunlabelled faults\ttargets in fault\t")
	row := func(name string, dur float64, t scoreTotal) {
		det := "-"
		if t.Presences > 0 {
			det = fmt.Sprintf("%d/%d", t.Detected, t.Presences)
		}
		faults := "-"
		if t.FaultsLabelled > 0 {
			faults = fmt.Sprintf("%d/%d", t.FaultsRaised, t.FaultsLabelled)
		}
		fmt.Fprintf(tw, "%s\t%.0f\t%s\t%s\t%d\t%s\t%s\t%s\t%d\t%s\t%s\t%d\t%d\t\n", name, dur, det, FmtNum(MaxOf(t.Delays), 2), t.False,
			FmtNum(t.falsePerHour(), 1), FmtNum(Quantile(t.Errors, 0.5), 3), FmtNum(Quantile(t.Errors, 0.95), 3), t.Breaks,
			faults, FmtNum(MaxOf(t.FaultDelays), 2), t.FalseFaults, t.FaultTargets)
	}
	var dur float64
	for _, c := range cs {
		row(c.Name, c.Duration, TotalOf([]ClipScore{c}))
		dur += c.Duration
	}
	t := TotalOf(cs)
	row("total", dur, t)
	tw.Flush()
	fmt.Fprintf(w, "first-alert delay: median %s s, worst %s s over %d detections; intruder-free footage %.2f h\n",
		FmtNum(Quantile(t.Delays, 0.5), 2), FmtNum(MaxOf(t.Delays), 2), len(t.Delays), t.FreeHours)
	if t.FaultsLabelled > 0 || t.FalseFaults > 0 || t.FaultTargets > 0 || t.FaultBreaks > 0 {
		fmt.Fprintf(w, "picture faults: %d of %d raised, delay median %s s, worst %s s; %d raised with none labelled; %d targets while a fault was on; %d cleared while the fault was still on\n",
			t.FaultsRaised, t.FaultsLabelled, FmtNum(Quantile(t.FaultDelays, 0.5), 2), FmtNum(MaxOf(t.FaultDelays), 2), t.FalseFaults, t.FaultTargets, t.FaultBreaks)
	}
}

// FmtNum formats v with prec decimals, "-" for NaN.
func FmtNum(v float64, prec int) string {
	if math.IsNaN(v) {
		return "-"
	}
	return fmt.Sprintf("%.*f", prec, v)
}

// ScoreFiles reads one replay output and its labels and scores them.
func ScoreFiles(replayPath, labelPath string, rules scoreRules) (ClipScore, error) {
	f, err := os.Open(replayPath)
	if err != nil {
		return ClipScore{}, fmt.Errorf("score: %w", err)
	}
	defer f.Close()
	lines, err := ReadReplay(f, replayPath)
	if err != nil {
		return ClipScore{}, fmt.Errorf("score: %w", err)
	}
	t, err := ReadLabels(labelPath)
	if err != nil {
		return ClipScore{}, fmt.Errorf("score: %w", err)
	}
	return scoreClip(replayPath, lines, t, rules)
}
