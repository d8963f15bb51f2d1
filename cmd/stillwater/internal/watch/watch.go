// Package watch runs one camera: capture with reconnects, the pipeline,
// the watchdog, heartbeats, processing lag, evidence clips and the
// empty-pool reference.
package watch

import (
	"context"
	"errors"
	"fmt"
	"image"
	"io"
	"log/slog"
	"math/rand/v2"
	"os"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/metrics"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/homography"
	"stillwater/vision"
	"stillwater/vision/remux"
)

// Camera runs one camera: capture with reconnects, the detection
// pipeline, a watchdog that reports a lost camera whatever a blocked read
// is doing, and heartbeats. Every camera has its own; a failing camera
// never holds up another.
type Camera struct {
	Cam       config.CameraConfig // the camera's settings as configured
	out       pipeline.Sink
	armed     func(now time.Time) bool
	now       func() time.Time
	log       *slog.Logger
	met       *metrics.Camera
	heartbeat time.Duration
	version   string

	epoch     time.Time     // wall time of media time 0
	seq       atomic.Uint64 // message sequence, shared by every kind
	lastFrame atomic.Int64  // unix ns (by now) of the last frame read
	Nframes   atomic.Int64  // frames read since start
	faults    faultBoard
	lag       lagWatch        // the processing_lag fault (lag.go)
	rec       *remux.Recorder // the main stream's pre-roll, when the camera names one (evidence.go)

	Reload   chan config.CameraConfig // new calibration, zones, detection for this camera
	gate     vision.OpenGate          // one open of the source at a time; a hung one is abandoned
	evidence EvidenceSettings
	// pendingEvidence is planned by the pipeline while it makes a target
	// start, and handed to the evidence writer once the frame's messages
	// are published (capture goroutine only).
	pendingEvidence []evidenceJob
	snapReq         chan chan snapshot // HTTP asks the capture goroutine for a frame
	viewReq         chan viewRequest   // the page asks it for the frame and tracks (page.go)
	why             whyBook            // the latest alarms' features, for the page (page.go)
	refs            *referenceKeeper   // the empty-pool reference (reference.go)
}

// New returns the watcher of one camera; out takes its messages, armed
// says whether the pool is armed at a time, met (may be nil) records its
// series. Run starts it.
func New(cam config.CameraConfig, out pipeline.Sink, armed func(time.Time) bool, now func() time.Time, log *slog.Logger, met *metrics.Camera, heartbeat time.Duration, version string, ev EvidenceSettings) *Camera {
	w := &Camera{
		Cam: cam, out: out, armed: armed, now: now, log: log.With("camera", cam.ID), met: met,
		heartbeat: heartbeat, version: version, epoch: now(), Reload: make(chan config.CameraConfig, 1),
		evidence: ev, snapReq: make(chan chan snapshot), viewReq: make(chan viewRequest),
	}
	w.lastFrame.Store(w.epoch.UnixNano())
	w.Cam = config.DetectionCamera(cam)
	w.startRecorder()
	return w
}

// Run watches until ctx ends, or a file source (not looped) ends.
func (w *Camera) Run(ctx context.Context) error {
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		w.watchdog(ctx)
	}()
	if w.rec != nil {
		wg.Add(1)
		go func() {
			defer wg.Done()
			w.runRecorder(ctx)
		}()
	}
	err := w.capture(ctx)
	stopped := ctx.Err() == nil
	cancel()
	wg.Wait() // the watchdog is gone: nothing can clear the fault below
	if err != nil && stopped {
		// The camera stops being watched: say so on the bus, not only in
		// the log.
		w.Raise(context.WithoutCancel(ctx), alert.FaultCameraLost, true, "camera stopped: "+err.Error())
	}
	return err
}

// frameTimeout is the watchdog limit for this camera.
func (w *Camera) frameTimeout() time.Duration { return time.Duration(w.Cam.FrameTimeout) }

// watchdog checks every 200 ms that frames arrive. No frame for longer
// than the frame timeout while armed raises camera_lost at once; the next
// frame clears it. It also sends the heartbeats.
func (w *Camera) watchdog(ctx context.Context) {
	tick := time.NewTicker(200 * time.Millisecond)
	defer tick.Stop()
	lastBeat := w.now()
	beatFrames := w.Nframes.Load()
	for {
		select {
		case <-ctx.Done():
			return
		case <-tick.C:
		}
		now := w.now()
		since := now.Sub(time.Unix(0, w.lastFrame.Load()))
		// Within the frame timeout of the start a camera that has not
		// delivered yet is not lost, but it is not up either: up needs a
		// frame.
		recent := since <= w.frameTimeout()
		up := recent && w.Nframes.Load() > 0
		w.met.CameraUp(up)
		armed := w.armed(now)
		w.met.ArmedState(armed)
		switch {
		case !recent && armed:
			w.Raise(ctx, alert.FaultCameraLost, true, w.lostDetail(since))
		case up:
			w.Raise(ctx, alert.FaultCameraLost, false, "frames arrive again")
		}
		if w.heartbeat > 0 && now.Sub(lastBeat) >= w.heartbeat {
			n := w.Nframes.Load()
			fps := float64(n-beatFrames) / now.Sub(lastBeat).Seconds()
			w.beat(ctx, now, fps, up, armed)
			lastBeat, beatFrames = now, n
		}
	}
}

// lostDetail says why no frame came: for how long, and whether an open
// of the source is blocked in the backend.
func (w *Camera) lostDetail(since time.Duration) string {
	msg := fmt.Sprintf("no frame from %s for %.1f s", vision.Redact(w.Cam.Source), since.Seconds())
	if w.Nframes.Load() == 0 {
		msg = fmt.Sprintf("no frame from %s since the start (%.1f s)", vision.Redact(w.Cam.Source), since.Seconds())
	}
	if stuck, at := w.gate.Stuck(); stuck {
		msg += fmt.Sprintf("; an open has been blocked in the video backend for %.0f s", time.Since(at).Seconds())
	}
	return msg
}

// Raise publishes a fault when its state changes; repeated calls with the
// same state do nothing.
func (w *Camera) Raise(ctx context.Context, kind string, active bool, msg string) {
	if !w.faults.set(kind, active) {
		return
	}
	w.met.Fault(kind, active)
	if active {
		w.log.Error("camera fault", "fault", kind, "detail", msg)
	} else {
		w.log.Warn("camera fault cleared", "fault", kind, "detail", msg)
	}
	f := alert.NewFault(w.Cam.ID, w.seq.Add(1), w.now(), kind, active, msg)
	w.sendFault(ctx, f)
}

func (w *Camera) sendFault(ctx context.Context, f alert.Fault) {
	b, err := alert.Encode(f)
	if err != nil {
		w.log.Error("cannot encode fault", "err", err)
		return
	}
	w.send(ctx, pipeline.Message{Camera: w.Cam.ID, Kind: alert.KindFault, ID: alert.FaultID(f, w.epoch), Data: b})
}

func (w *Camera) beat(ctx context.Context, now time.Time, fps float64, up, armed bool) {
	hb := alert.Heartbeat{V: alert.Version, Kind: alert.KindBeat, Camera: w.Cam.ID, Time: now.UTC(), FPS: pipeline.Round3(fps), CameraOK: up && !w.faults.any(), Armed: armed, Version: w.version}
	b, err := alert.Encode(hb)
	if err != nil {
		w.log.Error("cannot encode heartbeat", "err", err)
		return
	}
	w.send(ctx, pipeline.Message{Camera: w.Cam.ID, Kind: alert.KindBeat, ID: w.msgID(w.seq.Add(1), "beat"), Data: b})
	w.met.Heartbeat(now)
}

func (w *Camera) msgID(seq uint64, what string) string {
	return fmt.Sprintf("%s-%d-%d-%s", w.Cam.ID, w.epoch.UnixNano(), seq, what)
}

func (w *Camera) send(ctx context.Context, m pipeline.Message) {
	t0 := time.Now()
	if err := w.out.Send(ctx, m); err != nil {
		w.log.Error("publish failed", "kind", m.Kind, "err", err)
		w.met.PublishError()
		return
	}
	w.met.Stage("publish", time.Since(t0))
}

// capture opens the source, runs the pipeline over its frames and, after
// a failure, reconnects with exponential backoff and jitter, keeping the
// learned background when the camera comes back to the same view (a warm
// start: a child who entered during the outage is found at once; see
// vision.Result.Rejoining for how the picture is trusted again). The
// backoff stops growing at 2 s: a pool camera that comes back must be
// watched again within seconds, and one attempt every 2 s costs a home
// network nothing.
func (w *Camera) capture(ctx context.Context) error {
	bo := backoff{min: 100 * time.Millisecond, max: 2 * time.Second}
	var vc *vision.Camera
	var cal *homography.Calibration
	for vc == nil {
		// The calibration is built once, on the first try that gets that
		// far, and shared by the detector, the processor and the zones.
		var err error
		if cal == nil {
			cal, err = config.NewCalibration(w.Cam)
		}
		if err == nil {
			vc, err = w.open(cal)
		}
		if err == nil {
			break
		}
		d := bo.next()
		w.log.Warn("camera open failed; trying again", "err", err, "in", d.Round(time.Millisecond))
		if !sleep(ctx, d) {
			return nil
		}
	}
	defer vc.Close()
	bo.reset()
	proc, err := pipeline.New(w.Cam, cal, vc.FPS(), w.epoch, w.now, w.log, w.met)
	if err != nil {
		return err
	}
	drift, err := pipeline.NewDriftChecker(w.Cam, proc.Calibration)
	if err != nil {
		// The pool is still watched; only the camera-moved check is off.
		w.log.Error("camera-moved check off", "err", err)
	}
	st := &captureState{proc: proc, drift: drift, health: pipeline.NewPictureFaults(vision.HealthConfig{})}
	// A reload swaps st.drift (closing the one it replaces): close the
	// one held at the end.
	defer func() { st.drift.Close() }()
	for ctx.Err() == nil {
		err := w.frames(ctx, vc, st)
		switch {
		case ctx.Err() != nil:
			return nil
		case errors.Is(err, io.EOF):
			w.log.Info("source ended", "frames", w.Nframes.Load())
			return nil
		case errors.Is(err, vision.ErrDamagedMedia):
			return fmt.Errorf("camera %s: %w", w.Cam.ID, err)
		}
		w.log.Warn("camera read failed; reconnecting", "err", err)
		for ctx.Err() == nil {
			d := bo.next()
			if !sleep(ctx, d) {
				return nil
			}
			w.met.Reconnect()
			info, err := vc.Reconnect()
			if err != nil {
				w.log.Warn("reconnect failed; trying again", "err", err, "next_in", bo.peek().Round(time.Millisecond))
				continue
			}
			bo.reset()
			w.log.Info("camera back", "size", info.Size, "model_kept", !info.Rebuilt)
			if info.Rebuilt {
				proc.ModelRestarted()
			}
			if err := proc.Calibration.CheckFrame(info.Size); err != nil {
				w.Raise(ctx, alert.FaultCalibrationDrift, true, err.Error())
			}
			break
		}
	}
	return nil
}

// open opens the source with the camera's detector, set up for the
// camera's calibration cal.
func (w *Camera) open(cal *homography.Calibration) (*vision.Camera, error) {
	dc, err := pipeline.DetectorConfig(w.Cam, cal)
	if err != nil {
		return nil, err
	}
	w.useReference(&dc)
	vc, err := vision.OpenCamera(w.sourceConfig(), dc)
	if err != nil {
		return nil, err
	}
	if err := cal.CheckFrame(vc.Size()); err != nil {
		vc.Close()
		return nil, fmt.Errorf("camera %s: %w", w.Cam.ID, err)
	}
	if w.evidence.on {
		if err := os.MkdirAll(w.evidence.dir, 0o750); err != nil {
			w.log.Error("evidence directory", "err", err)
		}
		if err := vc.EnableEvidence(vision.EvidenceConfig{PreRoll: w.evidence.preRoll, PostRoll: w.evidence.postRoll, OnWritten: w.evidenceWritten, SnapshotsOnly: w.rec != nil}); err != nil {
			vc.Close()
			return nil, fmt.Errorf("camera %s: evidence: %w", w.Cam.ID, err)
		}
	}
	w.log.Info("camera open", "source", vision.Redact(w.Cam.Source), "size", vc.Size(), "fps", vc.FPS())
	return vc, nil
}

// captureState is what lives across reconnects of one camera.
type captureState struct {
	proc   *pipeline.Processor
	drift  *pipeline.DriftChecker
	health *pipeline.PictureFaults
	stats  vision.CaptureStats
	hold   []image.Rectangle
}

// frames processes frames until the source fails or ends.
func (w *Camera) frames(ctx context.Context, vc *vision.Camera, st *captureState) error {
	live := strings.Contains(w.Cam.Source, "://")
	proc := st.proc
	proc.Evidence = w.planEvidence
	defer func() { proc.Evidence = nil; w.pendingEvidence = w.pendingEvidence[:0] }()
	for {
		if ctx.Err() != nil {
			return nil
		}
		w.takeReload(proc, st)
		w.answerSnapshot(vc, proc)
		w.answerView(vc, proc, w.Nframes.Load())
		t0 := time.Now()
		r, err := vc.Next(st.hold)
		w.countStats(vc, st)
		if err != nil {
			return err
		}
		// A frame that took most of the frame timeout to come is the
		// decoder flushing what it held when the stream stopped, not a
		// sign of life: FFmpeg hands over one such frame after its read
		// timeout (measured in the RTSP test: 3.0 s of waiting, then one
		// frame, then the error). It is processed but does not feed the
		// watchdog.
		if waited := time.Since(t0); waited < w.frameTimeout()*4/5 {
			w.lastFrame.Store(w.now().UnixNano())
		} else {
			w.log.Warn("late frame after a stalled read", "waited", waited.Round(time.Millisecond))
		}
		w.Nframes.Add(1)
		w.met.Frame()
		w.met.Stage("vision", time.Since(t0))
		captured := vc.Captured()
		switch {
		case live:
			r.Media = w.now().Sub(w.epoch)
		case w.Cam.Realtime:
			// As a live camera's: when the frame was due, so that
			// frame_time says when it was taken.
			r.Media = captured.Sub(w.epoch)
		}
		armed := w.armed(w.now())
		for _, f := range st.health.Observe(r.Media, r.Health, armed) {
			w.Raise(ctx, f.Kind, f.Active, f.Detail)
		}
		switch r.Rejoined {
		case "":
		case vision.RejoinForced:
			w.log.Warn("picture never settled after connecting; learning the background anew", "after", vision.RejoinLimit)
		default:
			w.log.Info("picture trusted again after connecting", "background", r.Rejoined)
		}
		// A frame that was only probed (see vision.Result.Rejoining) does
		// not move tracks, alarms or the camera-moved check: they wait for
		// a picture that can be trusted.
		if r.Rejoining {
			proc.Step(r, armed) // gives nothing, but hears how the probing ended
		} else {
			t1 := time.Now()
			proc.Frozen = st.health.Frozen()
			proc.StillSince, proc.Still = st.health.StillSince()
			msgs, h := proc.Step(r, armed)
			st.hold = h
			w.met.Stage("track", time.Since(t1))
			w.keepReference(vc, proc, r, armed)
			for _, m := range msgs {
				w.send(ctx, m)
			}
			// Published first, then the evidence is queued.
			w.keepEvidence(vc, proc)
			if st.drift.Due(r.Media) {
				w.checkDrift(ctx, st.drift.Check(r.Media, vc))
			}
		}
		w.met.Processed(time.Since(t0))
		w.frameAge(ctx, time.Since(captured), armed)
	}
}

// countStats exports the capture counters' growth.
func (w *Camera) countStats(vc *vision.Camera, st *captureState) {
	s := vc.Stats()
	w.met.DecodeErrors(int(s.DecodeErrors - st.stats.DecodeErrors))
	w.met.DroppedFrames(int(s.Dropped - st.stats.Dropped))
	st.stats = s
}

// takeReload applies a pending reload between frames.
func (w *Camera) takeReload(proc *pipeline.Processor, st *captureState) {
	select {
	case c := <-w.Reload:
		c = config.DetectionCamera(c)
		if err := proc.Reload(c); err != nil {
			w.log.Error("reload refused; keeping the running settings", "err", err)
			return
		}
		// w.cam keeps the source settings (and is read by the watchdog
		// and HTTP); the processor now holds the new calibration, zones
		// and detection settings.
		if d, err := pipeline.NewDriftChecker(c, proc.Calibration); err != nil {
			w.log.Error("reload: camera-moved check off", "err", err)
		} else {
			st.drift.Close()
			st.drift = d
		}
		w.log.Info("calibration, zones, gating and alarm timing reloaded; the detector's water outline and model settings change at the next restart")
	default:
	}
}

// checkDrift raises or clears calibration_drift from one comparison.
func (w *Camera) checkDrift(ctx context.Context, st pipeline.DriftStatus) {
	var active bool
	switch {
	case st.Moved || st.Lost:
		active = true
	case st.Err == nil:
		active = false
	default:
		return // one failed registration decides nothing
	}
	if !w.faults.set(alert.FaultCalibrationDrift, active) {
		return
	}
	w.met.Fault(alert.FaultCalibrationDrift, active)
	if active {
		w.log.Error("camera moved: positions are not trustworthy until recalibrated", "shift_m", st.ShiftM, "lost", st.Lost)
	} else {
		w.log.Warn("camera matches its calibration again", "shift_m", st.ShiftM)
	}
	w.sendFault(ctx, alert.NewDriftFault(w.Cam.ID, w.seq.Add(1), w.now(), active, pipeline.Round3(st.ShiftM)))
}

func (w *Camera) sourceConfig() vision.SourceConfig {
	rt := w.frameTimeout()
	return vision.SourceConfig{URI: w.Cam.Source, Transport: w.Cam.Transport, OpenTimeout: 5 * time.Second, ReadTimeout: rt, Loop: w.Cam.Loop, Realtime: w.Cam.Realtime, Deblock: w.Cam.Deblock, Gate: &w.gate}
}

// sleep waits d or until ctx ends; it reports whether ctx is still live.
func sleep(ctx context.Context, d time.Duration) bool {
	if d <= 0 {
		return ctx.Err() == nil
	}
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
		return false
	case <-t.C:
		return true
	}
}

// backoff doubles a delay from min up to max, with ±20 % jitter so that
// cameras that failed together do not retry together.
type backoff struct {
	min, max, cur time.Duration
}

func (b *backoff) next() time.Duration {
	switch {
	case b.cur == 0:
		b.cur = b.min
	case b.cur < b.max:
		b.cur = min(2*b.cur, b.max)
	}
	j := 0.8 + 0.4*rand.Float64()
	return time.Duration(float64(b.cur) * j)
}

func (b *backoff) reset() { b.cur = 0 }

// peek is the delay the next call will start from, without jitter.
func (b *backoff) peek() time.Duration { return min(max(2*b.cur, b.min), b.max) }

// faultBoard holds which faults are active for one camera.
type faultBoard struct {
	mu     sync.Mutex
	active map[string]bool
}

// set records a fault's state and reports whether it changed.
func (f *faultBoard) set(kind string, active bool) bool {
	f.mu.Lock()
	defer f.mu.Unlock()
	if f.active == nil {
		f.active = map[string]bool{}
	}
	if f.active[kind] == active {
		return false
	}
	f.active[kind] = active
	return true
}

// any reports whether some fault is active.
func (f *faultBoard) any() bool {
	f.mu.Lock()
	defer f.mu.Unlock()
	for _, a := range f.active {
		if a {
			return true
		}
	}
	return false
}

// Ready says why this camera is not ready: armed and without frames.
func (w *Camera) Ready(now time.Time) error {
	since := now.Sub(time.Unix(0, w.lastFrame.Load()))
	if w.armed(now) && since > w.frameTimeout() {
		return fmt.Errorf("camera %s: armed and no frame for %.1f s", w.Cam.ID, since.Seconds())
	}
	return nil
}
