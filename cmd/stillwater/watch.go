package main

import (
	"context"
	"errors"
	"fmt"
	"image"
	"io"
	"log/slog"
	"math/rand/v2"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"stillwater/alert"
	"stillwater/vision"
)

// cameraWatch runs one camera: capture with reconnects, the detection
// pipeline, a watchdog that reports a lost camera whatever a blocked read
// is doing, and heartbeats. Every camera has its own; a failing camera
// never holds up another.
type cameraWatch struct {
	cam       CameraConfig
	out       sink
	armed     func(now time.Time) bool
	now       func() time.Time
	log       *slog.Logger
	met       *cameraMetrics
	heartbeat time.Duration
	version   string

	epoch     time.Time     // wall time of media time 0
	seq       atomic.Uint64 // message sequence, shared by every kind
	lastFrame atomic.Int64  // unix ns (by now) of the last frame read
	nframes   atomic.Int64  // frames read since start
	faults    faultBoard

	reload chan CameraConfig // new calibration, zones, detection for this camera
}

func newCameraWatch(cam CameraConfig, out sink, armed func(time.Time) bool, now func() time.Time, log *slog.Logger, met *cameraMetrics, heartbeat time.Duration, version string) *cameraWatch {
	w := &cameraWatch{
		cam: cam, out: out, armed: armed, now: now, log: log.With("camera", cam.ID), met: met,
		heartbeat: heartbeat, version: version, epoch: now(), reload: make(chan CameraConfig, 1),
	}
	w.lastFrame.Store(w.epoch.UnixNano())
	return w
}

// run watches until ctx ends, or a file source (not looped) ends.
func (w *cameraWatch) run(ctx context.Context) error {
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		w.watchdog(ctx)
	}()
	err := w.capture(ctx)
	cancel()
	wg.Wait()
	return err
}

// frameTimeout is the watchdog limit for this camera.
func (w *cameraWatch) frameTimeout() time.Duration { return time.Duration(w.cam.FrameTimeout) }

// watchdog checks every 200 ms that frames arrive. No frame for longer
// than the frame timeout while armed raises camera_lost at once; the next
// frame clears it. It also sends the heartbeats.
func (w *cameraWatch) watchdog(ctx context.Context) {
	tick := time.NewTicker(200 * time.Millisecond)
	defer tick.Stop()
	lastBeat := w.now()
	beatFrames := w.nframes.Load()
	for {
		select {
		case <-ctx.Done():
			return
		case <-tick.C:
		}
		now := w.now()
		since := now.Sub(time.Unix(0, w.lastFrame.Load()))
		up := since <= w.frameTimeout()
		w.met.cameraUp(up)
		armed := w.armed(now)
		w.met.armedState(armed)
		switch {
		case !up && armed:
			w.raise(ctx, alert.FaultCameraLost, true, fmt.Sprintf("no frame from %s for %.1f s", vision.Redact(w.cam.Source), since.Seconds()))
		case up:
			w.raise(ctx, alert.FaultCameraLost, false, "frames arrive again")
		}
		if w.heartbeat > 0 && now.Sub(lastBeat) >= w.heartbeat {
			n := w.nframes.Load()
			fps := float64(n-beatFrames) / now.Sub(lastBeat).Seconds()
			w.beat(ctx, now, fps, up, armed)
			lastBeat, beatFrames = now, n
		}
	}
}

// raise publishes a fault when its state changes; repeated calls with the
// same state do nothing.
func (w *cameraWatch) raise(ctx context.Context, kind string, active bool, msg string) {
	if !w.faults.set(kind, active) {
		return
	}
	w.met.fault(kind, active)
	if active {
		w.log.Error("camera fault", "fault", kind, "detail", msg)
	} else {
		w.log.Warn("camera fault cleared", "fault", kind, "detail", msg)
	}
	f := alert.NewFault(w.cam.ID, w.seq.Add(1), w.now(), kind, active, msg)
	w.sendFault(ctx, f)
}

func (w *cameraWatch) sendFault(ctx context.Context, f alert.Fault) {
	b, err := alert.Encode(f)
	if err != nil {
		w.log.Error("cannot encode fault", "err", err)
		return
	}
	w.send(ctx, outMsg{Camera: w.cam.ID, Kind: alert.KindFault, ID: alert.FaultID(f, w.epoch), Data: b})
}

func (w *cameraWatch) beat(ctx context.Context, now time.Time, fps float64, up, armed bool) {
	hb := alert.Heartbeat{V: alert.Version, Kind: alert.KindBeat, Camera: w.cam.ID, Time: now.UTC(), FPS: round3(fps), CameraOK: up && !w.faults.any(), Armed: armed, Version: w.version}
	b, err := alert.Encode(hb)
	if err != nil {
		w.log.Error("cannot encode heartbeat", "err", err)
		return
	}
	w.send(ctx, outMsg{Camera: w.cam.ID, Kind: alert.KindBeat, ID: w.msgID(w.seq.Add(1), "beat"), Data: b})
	w.met.heartbeat(now)
}

func (w *cameraWatch) msgID(seq uint64, what string) string {
	return fmt.Sprintf("%s-%d-%d-%s", w.cam.ID, w.epoch.UnixNano(), seq, what)
}

func (w *cameraWatch) send(ctx context.Context, m outMsg) {
	t0 := time.Now()
	if err := w.out.send(ctx, m); err != nil {
		w.log.Error("publish failed", "kind", m.Kind, "err", err)
		w.met.publishError()
		return
	}
	w.met.stage("publish", time.Since(t0))
}

// capture opens the source, runs the pipeline over its frames and opens it
// again after a failure, with exponential backoff and jitter. The backoff
// stops growing at 2 s: a pool camera that comes back must be watched
// again within seconds, and one attempt every 2 s costs a home network
// nothing.
func (w *cameraWatch) capture(ctx context.Context) error {
	bo := backoff{min: 100 * time.Millisecond, max: 2 * time.Second}
	var proc *processor
	var offset, lastMedia time.Duration
	for ctx.Err() == nil {
		vc, err := vision.OpenCamera(w.sourceConfig(), w.detectorConfig())
		if err != nil {
			d := bo.next()
			w.log.Warn("camera open failed; trying again", "err", err, "in", d.Round(time.Millisecond))
			w.met.reconnect()
			if !sleep(ctx, d) {
				return nil
			}
			continue
		}
		bo.reset()
		if proc == nil {
			if proc, err = newProcessor(w.cam, vc.FPS(), w.epoch, w.now, w.log, w.met); err != nil {
				vc.Close()
				return err
			}
		}
		w.log.Info("camera open", "source", vision.Redact(w.cam.Source), "size", vc.Size(), "fps", vc.FPS())
		// Media time keeps running across reopenings: a reopened file
		// starts at 0 again and a live camera's clock restarts.
		if lastMedia > 0 {
			offset = lastMedia + frameStep(vc.FPS())
		}
		lastMedia, err = w.frames(ctx, vc, proc, offset)
		vc.Close()
		switch {
		case ctx.Err() != nil:
			return nil
		case errors.Is(err, io.EOF) && !w.cam.Loop:
			w.log.Info("source ended", "frames", w.nframes.Load())
			return nil
		case errors.Is(err, io.EOF):
			continue
		case err != nil:
			d := bo.next()
			w.log.Warn("camera read failed; reconnecting", "err", err, "in", d.Round(time.Millisecond))
			w.met.reconnect()
			if !sleep(ctx, d) {
				return nil
			}
		}
	}
	return nil
}

// frames processes frames until the source fails or ends, returning the
// media time of the last frame.
func (w *cameraWatch) frames(ctx context.Context, vc *vision.Camera, proc *processor, offset time.Duration) (time.Duration, error) {
	fps := vc.FPS()
	live := strings.Contains(w.cam.Source, "://")
	paceStart := time.Now()
	var hold []image.Rectangle
	var last time.Duration
	for {
		if ctx.Err() != nil {
			return last, nil
		}
		select {
		case c := <-w.reload:
			if err := proc.reload(c); err != nil {
				w.log.Error("reload refused; keeping the running settings", "err", err)
			} else {
				w.cam = c
				w.log.Info("calibration, zones and detection settings reloaded")
			}
		default:
		}
		t0 := time.Now()
		r, err := vc.Next(hold)
		if err != nil {
			return last, err
		}
		w.lastFrame.Store(w.now().UnixNano())
		w.nframes.Add(1)
		w.met.frame()
		w.met.stage("vision", time.Since(t0))
		if live {
			r.Media = w.now().Sub(w.epoch)
		} else {
			r.Media += offset
		}
		last = r.Media
		t1 := time.Now()
		msgs, h := proc.step(r, w.armed(w.now()))
		hold = h
		w.met.stage("track", time.Since(t1))
		for _, m := range msgs {
			w.send(ctx, m)
		}
		w.met.processed(time.Since(t0))
		if w.cam.Realtime && fps > 0 && !live {
			due := paceStart.Add(time.Duration(float64(r.Index+1) / fps * float64(time.Second)))
			if !sleep(ctx, time.Until(due)) {
				return last, nil
			}
		}
	}
}

func (w *cameraWatch) sourceConfig() vision.SourceConfig {
	return vision.SourceConfig{URI: w.cam.Source, Transport: w.cam.Transport, OpenTimeout: 5 * time.Second, ReadTimeout: 5 * time.Second}
}

func (w *cameraWatch) detectorConfig() vision.DetectorConfig {
	d := w.cam.Detect
	return vision.DetectorConfig{
		ProcessWidth: d.ProcessWidth, Method: d.Method, History: d.History,
		Threshold: d.Threshold, LearningRate: -1, MinPixels: 6, Mask: cornersPolygon(w.cam),
	}
}

func frameStep(fps float64) time.Duration {
	if fps <= 0 {
		return 100 * time.Millisecond
	}
	return time.Duration(float64(time.Second) / fps)
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

// ready says why this camera is not ready: armed and without frames.
func (w *cameraWatch) ready(now time.Time) error {
	since := now.Sub(time.Unix(0, w.lastFrame.Load()))
	if w.armed(now) && since > w.frameTimeout() {
		return fmt.Errorf("camera %s: armed and no frame for %.1f s", w.cam.ID, since.Seconds())
	}
	return nil
}
