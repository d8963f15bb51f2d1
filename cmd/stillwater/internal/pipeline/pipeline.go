// Package pipeline is the per-frame path of one camera after the
// detector: blobs in pixels go through the calibration to pool metres,
// zones, the tracker and the judge, and the alarm decides what becomes a
// message. It also holds the camera-moved check, the picture-fault
// checks and the replay explainer.
package pipeline

import (
	"context"
	"fmt"
	"image"
	"log/slog"
	"math"
	"time"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/metrics"
	"stillwater/homography"
	"stillwater/vision"
	"stillwater/vision/track"
)

// Message is one message on its way to the bus (or a replay file).
type Message struct {
	Camera string
	Kind   string
	ID     string // de-duplication id, stable across retries
	Data   []byte
	Frame  int
	Media  time.Duration
}

// Sink receives the pipeline's messages.
type Sink interface {
	Send(ctx context.Context, m Message) error
}

// poolTrack and detection are the tracker's types carrying the rectified
// detector's measurements; positions are pool metres.
type (
	poolTrack = track.Track[vision.Features]
	detection = track.Detection[vision.Features]
)

// Processor is the per-camera decision chain after the vision stage: pixels
// to pool metres, physical-size gating, tracking and alarm logic. It is the
// same for the daemon and for replays.
type Processor struct {
	cam         config.CameraConfig
	Calibration *homography.Calibration // frame pixels → pool metres: lens, homography, refraction
	zones       zoneSet                 // exclusion polygons
	Tracks      []poolTrack
	// Evidence, when set, keeps the evidence of an alarm starting at this
	// frame and returns its reference for the target message.
	Evidence func(r vision.Result, o alert.Observation) string
	tracker  *track.Tracker[vision.Features]
	judge    *judge // which tracks of the rectified detector may alarm
	alarm    *alert.Alarm
	alarmed  map[int]bool // tracks in alarm
	// notes say what became of this frame's candidates, for explaining a
	// decision (explain.go); explain, when set, is called after each step.
	notes   []candidateNote
	Explain func(p *Processor, r vision.Result)
	// Clock, when set, times the stages of Step (benchmarks).
	Clock *StepClock
	// Frozen is set by the caller while the picture checks find the
	// picture frozen (PictureFaults.Frozen): a picture that does not
	// change shows nothing new, so no new target starts; targets already
	// raised go on.
	Frozen bool
	// StillSince and Still are set by the caller from the picture checks
	// (PictureFaults.StillSince): the water has not moved since StillSince.
	// A track whose run began after that starts no alarm for the first
	// stillHold of the stillness: a frozen picture is not yet reported
	// then, and the mean of a picture that stopped changing converges on
	// one snapshot of the water, which differs from the learned water as
	// something new would (gate fault/1000005: a target 0.9 s into a
	// freeze, 1.1 s before the fault was raised). A child getting in makes
	// the water move; every tuning intruder was raised as before.
	StillSince time.Duration
	Still      bool

	log     *slog.Logger
	Seq     uint64
	epoch   time.Time // wall time of media time 0
	now     func() time.Time
	metrics *metrics.Camera
}

// New returns the pipeline of one camera; cal is the camera's
// calibration, built once by the caller.
func New(cam config.CameraConfig, cal *homography.Calibration, fps float64, epoch time.Time, now func() time.Time, log *slog.Logger, m *metrics.Camera) (*Processor, error) {
	zones, err := newZoneSet(cam, cal)
	if err != nil {
		return nil, err
	}
	d := cam.Detect
	p := &Processor{
		cam:         cam,
		Calibration: cal,
		zones:       zones,
		alarm:       alert.NewAlarm(alert.AlarmConfig{Persist: time.Duration(d.Persist), UpdateEvery: time.Duration(d.UpdateEvery), ClearAfter: time.Duration(d.ClearAfter), MinHitRatio: alert.DefaultAlarm().MinHitRatio, MaxSpeed: alert.DefaultAlarm().MaxSpeed}, fps),
		judge:       newJudge(time.Duration(d.Persist), judgeRulesOf(d, nadirOf(cal)), log),
		alarmed:     map[int]bool{},
		log:         log,
		epoch:       epoch,
		now:         now,
		metrics:     m,
	}
	tc := track.TrackerConfig[vision.Features]{Gate: trackGate, MergeRadius: 0.4, MaxMissing: time.Duration(d.ClearAfter), Drift: unseenDrift(d.Method)}
	if d.Method == "meanvar" {
		tc.Penalty = p.debrisPenalty
	}
	p.tracker = track.NewTracker(tc)
	return p, nil
}

// Reported returns where a track is reported, in messages, on the page
// and on snapshots: the centre of its part at half its high contrast,
// to which vision.Features.ShiftX and ShiftY lead from the position its
// rules judge (t.X, t.Y). The same for the mixture-model detectors, whose
// features are zero.
func Reported(t track.Track[vision.Features]) homography.Point {
	return homography.Point{X: t.X + t.Features.ShiftX, Y: t.Y + t.Features.ShiftY}
}

// debrisPenalty ranks, for a track in alarm, a detection far smaller
// than a child's body behind any that could be the body: a leaf that
// drifted over a child keeping still, and merged with it for a while,
// must not lead the target away when it drifts on (tuning scene
// intruder/274: the target followed a leaf for three minutes and the
// child, no longer held, faded into the background).
func (p *Processor) debrisPenalty(t *track.Track[vision.Features], d track.Detection[vision.Features]) float64 {
	if !p.alarmed[t.ID] || d.Features.Half >= debrisShare*p.judge.rules.MinArea {
		return 0
	}
	return trackGate
}

// debrisShare of the smallest child's body at half contrast (the judge's
// MinArea, Features.Half) is what a detection must show to count as a
// body when a target in alarm chooses between detections. Measured on
// tuning scene intruder/274: the leaf that drew the target away measured
// 0.011-0.016 m² at half contrast, the still child it left 0.033-0.044 m².
const debrisShare = 0.5

// unseenDrift is how far, m/s, a child may have moved from a track's
// predicted position for each second the track has gone unseen beyond its
// run: a toddler's wading or paddling pace, about 0.5 m/s (from memory).
// A detection between a track in its run and one last seen there a
// second ago stays with the first. The mixture models (mog2, knn) keep
// plain nearest neighbour: their tracks are judged on their whole life,
// not their run, and on the development set this ranking raised 21 more
// of their false alarms.
func unseenDrift(method string) float64 {
	if method == "meanvar" {
		return 0.5
	}
	return 0
}

// faintShare of the smallest child's body (min_area_m2) is the least area
// of a faint candidate that may go on a target. Measured on the tuning
// set's intruder/12 (a child still under water for 4 minutes, a cloud
// over it): its faint candidates measured 0.023–0.062 m² (median 0.039);
// those of a false target raised 4 m away, on a small dark patch after the
// warm-up, at most 0.022.
const faintShare = 2.0 / 3

// faintReach, m, and faintSpeed, m/s: a faint candidate goes on a target
// in alarm only within faintReach of it and while the target keeps still.
// Measured: the faint candidates of tuning intruder/12's still child lay
// within 0.05 m of its target (0.1 m/s was too little: the noise of its
// velocity broke the target once); in the scenario suite's submerged
// scene, faint candidates of the swimming child's shadow, within the
// tracker's 0.6 m, drew its target 2–3 m off the child.
const (
	faintReach = 0.2
	faintSpeed = 0.25
)

// trackGate is how far, m, a detection may lie from a track to continue
// it.
const trackGate = 0.6

// Step turns one frame's blobs into messages and returns the boxes to hold
// out of background learning on the next frame. A frame that was only
// probed after a (re)connect (vision.Result.Rejoining) gives nothing; the
// one that ends the probing with the background model started again
// forgets the tracks (see ModelRestarted).
func (p *Processor) Step(r vision.Result, armed bool) ([]Message, []image.Rectangle) {
	if r.Rejoined == vision.RejoinRebuilt || r.Rejoined == vision.RejoinForced {
		p.ModelRestarted()
	}
	if r.Rejoining {
		return nil, nil
	}
	p.Clock.start()
	d := p.cam.Detect
	var dets []detection
	p.notes = p.notes[:0]
	for _, b := range r.Blobs {
		if b.Plane != nil {
			if det, ok := p.gate(r, b); ok {
				dets = append(dets, det)
			}
			continue
		}
		c, ok := p.Calibration.Surface(homography.Point(b.Centroid))
		if !ok {
			p.log.Debug("blob rejected: beyond the pool plane", "frame", r.Index, "px", b.Centroid)
			p.metrics.Rejected("outside")
			continue
		}
		if name, in := p.zones.excluded(homography.Point{X: b.Centroid.X, Y: b.Centroid.Y}, c); in {
			p.log.Debug("blob rejected: in exclusion zone", "frame", r.Index, "zone", name, "x_m", c.X, "y_m", c.Y)
			p.metrics.Rejected("zone")
			continue
		}
		area := ContourArea(p.Calibration, b.Contour)
		inside := p.Calibration.Inside(c)
		switch {
		case !inside:
			p.log.Debug("blob rejected: centre outside the pool", "frame", r.Index, "x_m", c.X, "y_m", c.Y)
			p.metrics.Rejected("outside")
			continue
		case area < d.MinArea:
			p.log.Debug("blob rejected: too small", "frame", r.Index, "area_m2", area, "min_m2", d.MinArea)
			p.metrics.Rejected("small")
			continue
		case area > d.MaxArea:
			p.log.Debug("blob rejected: too large", "frame", r.Index, "area_m2", area, "max_m2", d.MaxArea)
			p.metrics.Rejected("large")
			continue
		}
		dets = append(dets, detection{X: c.X, Y: c.Y, Area: area, Box: b.Box, Hold: b.Box.Inset(-4)})
	}
	p.Clock.lap(StepGate)
	tracks := p.tracker.Update(r.Media, dets)
	p.Tracks = tracks
	p.Clock.lap(StepTrack)
	bodies, left := deckBodies(p.notes, p.judge.rules.DeckMinArea)
	p.judge.observe(r.Media, tracks, bodies, left)
	obs := make([]alert.Observation, 0, len(tracks))
	var hold []image.Rectangle
	for _, t := range tracks {
		if ok, _ := p.judge.eligible(t.ID); !ok && d.Method == "meanvar" {
			continue
		}
		if p.Frozen && !p.alarmed[t.ID] {
			// A frozen snapshot of rippled water differs from the learned
			// mean as something still would (tuning scene fault/45: a
			// target 0.5 s after the frozen fault was raised).
			continue
		}
		if p.bornStill(t, r.Media) {
			continue
		}
		// The rules above judged t.X, t.Y; the target is reported where
		// Reported puts it.
		at := Reported(t)
		o := alert.Observation{Track: t.ID, X: at.X, Y: at.Y, VX: t.VX, VY: t.VY, Area: t.Area, First: t.First, Last: t.Last, Hits: t.Hits}
		if d.Method == "meanvar" && !p.alarmed[t.ID] {
			// Persistence and the share of frames seen count from the
			// track's current run, not from the sparse flicker it may
			// have grown out of.
			o.First, o.Hits = t.RunStart, t.RunHits
		}
		obs = append(obs, o)
		hold = append(hold, t.Hold)
	}
	p.metrics.Tracks(len(tracks))
	p.Clock.lap(StepJudge)
	var out []Message
	for _, dec := range p.alarm.Step(r.Media, obs, armed) {
		switch {
		case dec.Kind == alert.KindTarget && dec.Event == "start":
			p.alarmed[dec.Obs.Track] = true
		case dec.Kind == alert.KindCleared:
			delete(p.alarmed, dec.Obs.Track)
		}
		m, err := p.message(r, dec)
		if err != nil {
			p.log.Error("cannot encode message", "err", err)
			continue
		}
		out = append(out, m)
	}
	p.Clock.lap(StepAlarm)
	if p.Clock != nil {
		p.Clock.Frames++
	}
	p.noteTracks()
	if p.Explain != nil {
		p.Explain(p, r)
	}
	return out, hold
}

// stillHold is how long into a stillness of the water a track born in it
// is held back (Processor.StillSince): long enough for a frozen picture to
// be reported (within 2.4 s on the whole tuning and gate sets), short
// enough that a child already in perfectly calm water when the daemon
// starts waits no more than this.
const stillHold = 3 * time.Second

// bornStill reports whether track t, not in alarm, began its run after the
// water stopped moving, less than stillHold ago.
func (p *Processor) bornStill(t poolTrack, now time.Duration) bool {
	return p.Still && !p.alarmed[t.ID] && t.RunStart >= p.StillSince && now-p.StillSince < stillHold
}

func (p *Processor) message(r vision.Result, dec alert.Decision) (Message, error) {
	p.Seq++
	frameTime := p.epoch.Add(r.Media).UTC()
	now := p.now().UTC()
	o := dec.Obs
	var v any
	switch dec.Kind {
	case alert.KindTarget:
		var ref string
		if dec.Event == "start" {
			p.judge.raised(o.Track)
			f, n, speed := p.judge.summary(o.Track)
			p.log.Debug("track raised an alarm", append([]any{"track", o.Track, "dwell", dec.Dwell, "tracked", p.judge.age(o.Track), "x_m", Round3(o.X), "y_m", Round3(o.Y),
				"hits", o.Hits, "speed_mps", Round3(speed), "candidates", n}, featureArgs(f)...)...)
			p.metrics.Alarm()
			if p.Evidence != nil {
				ref = p.Evidence(r, o)
			}
		}
		v = alert.Target{
			V: alert.Version, Kind: alert.KindTarget, Camera: p.cam.ID, Track: o.Track, Seq: p.Seq, Event: dec.Event,
			Time: now, FrameTime: frameTime, Frame: r.Index,
			Surface:    alert.Position{X: Round3(o.X), Y: Round3(o.Y)},
			Floor:      floorOf(FloorPosition(p.Calibration, homography.Point{X: o.X, Y: o.Y})),
			Area:       round4(o.Area),
			Velocity:   alert.Velocity{X: Round3(o.VX), Y: Round3(o.VY)},
			Dwell:      Round3(dec.Dwell.Seconds()),
			Confidence: dec.Confidence,
			Evidence:   ref,
		}
	case alert.KindCleared:
		v = alert.Cleared{
			V: alert.Version, Kind: alert.KindCleared, Camera: p.cam.ID, Track: o.Track, Seq: p.Seq,
			Time: now, FrameTime: frameTime, Frame: r.Index,
			Last: alert.Position{X: Round3(o.X), Y: Round3(o.Y)}, Duration: Round3(dec.Dwell.Seconds()),
		}
	default:
		return Message{}, fmt.Errorf("unknown decision kind %q", dec.Kind)
	}
	b, err := alert.Encode(v)
	if err != nil {
		return Message{}, err
	}
	id := fmt.Sprintf("%s-%d-%d-%s", p.cam.ID, p.epoch.UnixNano(), p.Seq, dec.Kind)
	return Message{Camera: p.cam.ID, Kind: dec.Kind, ID: id, Data: b, Frame: r.Index, Media: r.Media}, nil
}

// ModelRestarted forgets the tracks when the detector's background model
// starts again (rebuilt for a new frame size, or learned anew after a
// reconnect): what the old model saw is no evidence for the new one, and
// a body still there starts a new track. Alarms clear on their own after
// ClearAfter, as for any track no longer seen.
func (p *Processor) ModelRestarted() { p.tracker.Reset() }

// Reload swaps in a camera's new calibration, zones and detection
// thresholds between frames, keeping tracks and alarms. The background
// model is not touched: the source and its size stay the same.
func (p *Processor) Reload(cam config.CameraConfig) error {
	cal, err := config.NewCalibration(cam)
	if err != nil {
		return err
	}
	zones, err := newZoneSet(cam, cal)
	if err != nil {
		return err
	}
	p.cam, p.Calibration, p.zones = cam, cal, zones
	p.judge.rules = judgeRulesOf(cam.Detect, nadirOf(cal))
	return nil
}

func floorOf(f alert.FloorPosition) alert.FloorPosition {
	return alert.FloorPosition{X: Round3(f.X), Y: Round3(f.Y), Depth: Round3(f.Depth)}
}

// Round3 rounds v to three decimals: millimetres for pool metres.
func Round3(v float64) float64 { return math.Round(v*1000) / 1000 }
func round4(v float64) float64 { return math.Round(v*10000) / 10000 }

// gate judges a candidate of the rectified detector, already in pool
// metres on the water surface, and returns it as a detection for the
// tracker; false, with the reason logged and counted, when it cannot be a
// person in the water.
func (p *Processor) gate(r vision.Result, b vision.Blob) (detection, bool) {
	d := p.cam.Detect
	f := b.Features
	c := homography.Point{X: b.Plane.X, Y: b.Plane.Y}
	reject := func(reason, why string, args ...any) (detection, bool) {
		p.log.Debug("candidate rejected: "+why, append([]any{"frame", r.Index, "x_m", Round3(c.X), "y_m", Round3(c.Y)}, append(args, featureArgs(f)...)...)...)
		p.metrics.Rejected(reason)
		p.notes = append(p.notes, candidateNote{At: c, Features: f, Rejected: why, Outside: reason == "outside"})
		return detection{}, false
	}
	if name, in := p.zones.excluded(homography.Point{X: b.Centroid.X, Y: b.Centroid.Y}, c); in {
		return reject("zone", "in exclusion zone", "zone", name)
	}
	if n := b.Plane.Near; n != nil && f.Foot == 0 && f.Wet >= uprightWet && !p.Calibration.Inside(c) {
		// Centre beyond the edge, near end on the water: a body upright
		// in the water, seen reaching away from the camera over the deck.
		if at := (homography.Point{X: n.X, Y: n.Y}); p.Calibration.Inside(at) {
			p.log.Debug("candidate upright in the water: placed at its end nearest the camera", "frame", r.Index, "centre_x_m", Round3(c.X), "centre_y_m", Round3(c.Y), "x_m", Round3(at.X), "y_m", Round3(at.Y))
			c = at
			f.ShiftX, f.ShiftY = 0, 0 // reported where it is placed
		}
	}
	switch {
	case !p.Calibration.Inside(c):
		return reject("outside", fmt.Sprintf("centre outside the pool (%.2f of it on the water)", f.Wet))
	case f.Foot >= footOnDeck:
		return reject("standing", fmt.Sprintf("stands on the deck: its end nearest the camera is %.2f m from the water, and what stands upright there is seen over the water", f.Foot))
	case f.Area < d.MinArea*candidateShare:
		return reject("small", fmt.Sprintf("far smaller than a child's body (%.3f m² < %.3f m²)", f.Area, d.MinArea*candidateShare))
	case f.Area > d.MaxArea:
		return reject("large", fmt.Sprintf("too large (%.3f m² > %.3f m²)", f.Area, d.MaxArea))
	case f.Faint && !p.nearAlarm(c):
		return reject("faint", fmt.Sprintf("below the threshold everywhere (peak %.0f), and no target in alarm keeping still within %.2f m to go on", f.Peak, faintReach))
	case f.Faint && f.Area < faintShare*d.MinArea:
		return reject("faint", fmt.Sprintf("below the threshold everywhere (peak %.0f), and smaller than a child's body (%.3f m² < %.3f m²)", f.Peak, f.Area, faintShare*d.MinArea))
	}
	p.notes = append(p.notes, candidateNote{At: c, Features: f})
	return detection{X: c.X, Y: c.Y, Area: f.Area, Box: b.Box, Hold: b.Plane.Cells, Features: f, FeatureArea: f.Area}, true
}

// footOnDeck is how far out on the deck, m, a candidate's end nearest the
// camera (vision.Features.Foot) must lie for it to stand there: a child in
// the water holding the coping reaches onto it with hands and arms, less
// than this (from memory: a toddler's forearm and hand are about 0.2 m).
const footOnDeck = 0.3

// uprightWet is the least share of a candidate on the water for it to be
// a body upright in the water when its centre lies beyond the edge and its
// end nearest the camera is on the water. Measured on the development
// set's H7, a child wading in at the far end of a camera 2.5 m up: 0.32–
// 0.38 of it on the water in the frames before its centre crossed.
const uprightWet = 0.25

// candidateShare is the share of min_area_m2 a candidate of the rectified
// detector needs to be tracked at all; the track must then show the whole
// min_area_m2 over the judge's window before it may alarm (a body entering
// the water shows a part of itself first).
const candidateShare = 0.35

// featureArgs are a candidate's features as log attributes.
func featureArgs(f vision.Features) []any {
	args := []any{"area_m2", round4(f.Area), "core_m2", round4(f.Core), "score", Round3(f.Score), "peak", Round3(f.Peak),
		"half_m2", round4(f.Half), "contrast", Round3(f.Contrast), "bright", Round3(f.Bright), "chroma", Round3(f.Chroma), "chroma_top", Round3(f.ChromaTop), "water_chroma", Round3(f.Water), "tint", Round3(f.Tint), "wet", Round3(f.Wet), "length_m", Round3(f.Length), "width_m", Round3(f.Width), "edge_m", Round3(f.Edge), "foot_m", Round3(f.Foot), "present", Round3(f.Present)}
	if f.Faint {
		args = append(args, "faint", true)
	}
	return args
}

// nearAlarm reports whether a track in alarm and keeping still was last
// within faintReach of c: a faint candidate (vision.Features.Faint) may
// only keep such a target where it is, never start or feed a track, nor
// draw a moving target off its body (the shadow a swimming child casts on
// the floor is faint too).
func (p *Processor) nearAlarm(c homography.Point) bool {
	for _, t := range p.Tracks {
		if p.alarmed[t.ID] && math.Hypot(t.X-c.X, t.Y-c.Y) <= faintReach && math.Hypot(t.VX, t.VY) <= faintSpeed {
			return true
		}
	}
	return false
}
