package watch

import (
	"context"
	"fmt"
	"net/http"
	"path/filepath"
	"strings"
	"time"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/vision"
	"stillwater/vision/remux"
)

// EvidenceSettings is what a camera keeps for each alarm.
type EvidenceSettings struct {
	on                bool
	dir               string // data_dir/evidence
	preRoll, postRoll time.Duration
	keep              vision.Retention
	ringRoot          string // the pre-roll rings of evidence streams, one directory per camera
}

// NewEvidenceSettings reads the evidence section of cfg.
func NewEvidenceSettings(cfg config.Config) EvidenceSettings {
	e := cfg.Evidence
	return EvidenceSettings{
		on:       e.On(),
		dir:      filepath.Join(cfg.DataDir, "evidence"),
		preRoll:  time.Duration(e.PreRoll),
		postRoll: time.Duration(e.PostRoll),
		keep:     vision.Retention{MaxFiles: e.MaxFiles, MaxBytes: e.MaxMB << 20, MaxAge: time.Duration(e.MaxAge)},
		ringRoot: filepath.Dir(RingDir(cfg, "x")),
	}
}

// annotation draws the water outline and every live track with its
// position in pool metres.
func annotation(cam config.CameraConfig, proc *pipeline.Processor, caption string) vision.Annotation {
	a := vision.Annotation{Outline: pipeline.WaterMask(proc.Calibration), Caption: caption}
	for _, t := range proc.Tracks {
		at := pipeline.Reported(t)
		a.Boxes = append(a.Boxes, vision.LabeledBox{Box: t.Box, Label: fmt.Sprintf("track %d  %.2f m, %.2f m%s", t.ID, at.X, at.Y, proc.Why(t.ID))})
	}
	return a
}

// evidenceJob is the evidence of one alarm start, named when the target
// message is made and written after it is published.
type evidenceJob struct {
	base    string // file name without extension, in the evidence directory
	caption string
	at      time.Time // when the frame that starts the alarm was taken
	track   int
}

// planEvidence names the evidence of an alarm that starts at this frame and
// queues it for keepEvidence; it returns the snapshot's path relative to
// the data directory for the target message, or "" when evidence is off.
// It touches neither the camera nor the disk: the message goes out first.
func (w *Camera) planEvidence(r vision.Result, o alert.Observation) string {
	if !w.evidence.on {
		return ""
	}
	stamp := w.epoch.Add(r.Media).UTC().Format("20060102T150405.000Z")
	stamp = strings.ReplaceAll(stamp, ".", "")
	base := fmt.Sprintf("%s-%s-track%d", w.Cam.ID, stamp, o.Track)
	caption := fmt.Sprintf("%s  %s  track %d at %.2f m, %.2f m", w.Cam.ID, w.epoch.Add(r.Media).UTC().Format(time.RFC3339), o.Track, o.X, o.Y)
	w.pendingEvidence = append(w.pendingEvidence, evidenceJob{base: base, caption: caption, at: w.epoch.Add(r.Media), track: o.Track})
	return filepath.Join("evidence", base+".jpg")
}

// keepEvidence hands the planned evidence to the camera's evidence writer:
// the annotated frame as a snapshot, and a clip started (or extended). It
// is called after the frame's messages are published and returns at once;
// the files are written on the writer's goroutine (evidenceWritten reports
// them). A failure is logged and never holds up an alarm.
func (w *Camera) keepEvidence(vc *vision.Camera, proc *pipeline.Processor) {
	for _, j := range w.pendingEvidence {
		snap := filepath.Join(w.evidence.dir, j.base+".jpg")
		if err := vc.SaveSnapshot(snap, annotation(w.Cam, proc, j.caption)); err != nil {
			w.log.Error("evidence snapshot not kept", "snapshot", filepath.Base(snap), "err", err)
		}
		w.keepWhy(j, proc)
		if w.rec != nil {
			if p, ext := w.rec.Clip(filepath.Join(w.evidence.dir, j.base+".mp4"), j.at, w.evidence.preRoll, w.evidence.postRoll, w.clipWritten); ext {
				w.log.Info("evidence clip extended", "clip", filepath.Base(p))
			}
			continue
		}
		if _, err := vc.StartClip(filepath.Join(w.evidence.dir, j.base+".avi")); err != nil {
			w.log.Error("evidence clip not kept", "err", err)
		}
	}
	w.pendingEvidence = w.pendingEvidence[:0]
}

// evidenceWritten runs on the camera's evidence writer goroutine for every
// snapshot written and clip finished: it logs them and applies retention,
// keeping the file just written and the clip still open.
func (w *Camera) evidenceWritten(ev vision.EvidenceWritten) {
	if ev.Err != nil {
		w.log.Error("evidence "+ev.Kind+" failed", "err", ev.Err)
		return
	}
	w.log.Info("evidence kept", "kind", ev.Kind, "file", filepath.Base(ev.Path), "frames", ev.Frames, "dropped", ev.Dropped,
		"took", ev.Took.Round(time.Millisecond))
	w.retain(ev.Path, ev.Recording)
}

// retain applies retention to the evidence directory, keeping the paths
// given (the file just written, a clip still open).
func (w *Camera) retain(paths ...string) {
	keep := w.evidence.keep
	for _, p := range paths {
		if p != "" {
			keep.Keep = append(keep.Keep, p)
		}
	}
	if n, err := vision.PruneEvidence(w.evidence.dir, keep, w.now()); err != nil {
		w.log.Error("evidence retention", "err", err)
	} else if n > 0 {
		w.log.Info("old evidence removed", "files", n)
	}
}

// answerSnapshot serves a pending request for the latest annotated frame.
// Only the capture goroutine may touch the camera, so HTTP asks it here.
func (w *Camera) answerSnapshot(vc *vision.Camera, proc *pipeline.Processor) {
	select {
	case reply := <-w.snapReq:
		caption := fmt.Sprintf("%s  %s", w.Cam.ID, w.now().UTC().Format(time.RFC3339))
		jpg, err := vc.Snapshot(annotation(w.Cam, proc, caption))
		reply <- snapshot{jpg: jpg, err: err}
	default:
	}
}

type snapshot struct {
	jpg []byte
	err error
}

// LatestHandler serves GET /cameras/{id}/latest.jpg: the camera's latest
// frame with the outline and tracks drawn.
func LatestHandler(watches []*Camera) http.Handler {
	return http.HandlerFunc(func(rw http.ResponseWriter, req *http.Request) {
		id := req.PathValue("id")
		for _, w := range watches {
			if w.Cam.ID != id {
				continue
			}
			reply := make(chan snapshot, 1)
			select {
			case w.snapReq <- reply:
			case <-time.After(3 * time.Second):
				http.Error(rw, "camera "+id+" is not delivering frames", http.StatusServiceUnavailable)
				return
			}
			select {
			case s := <-reply:
				if s.err != nil {
					http.Error(rw, s.err.Error(), http.StatusServiceUnavailable)
					return
				}
				rw.Header().Set("Content-Type", "image/jpeg")
				rw.Header().Set("Cache-Control", "no-store")
				rw.Write(s.jpg)
			case <-time.After(5 * time.Second):
				http.Error(rw, "camera "+id+" did not answer", http.StatusServiceUnavailable)
			}
			return
		}
		http.Error(rw, "no camera "+id, http.StatusNotFound)
	})
}

// startRecorder sets up the copying of the camera's main stream when it
// names one (evidence_source): the ring keeps the pre-roll and a little
// more, in segments of about 2 s. A recorder that cannot be set up is
// logged; the camera is watched all the same, with clips from its
// decoded frames.
func (w *Camera) startRecorder() {
	if !w.evidence.on || w.Cam.EvidenceSource == "" {
		return
	}
	rec, err := remux.New(remux.Config{
		Source: w.Cam.EvidenceSource, Transport: w.Cam.Transport, Realtime: w.Cam.Realtime, Loop: w.Cam.Loop,
		Dir:     filepath.Join(w.evidence.ringRoot, w.Cam.ID),
		Segment: RingSegment,
		Keep:    w.evidence.preRoll + RingSegment,
		Log:     w.log,
		OnState: func(up bool, _ error) { w.met.Recorder(up) }, // the recorder logs its exits
	})
	if err != nil {
		w.log.Error("evidence stream not recorded; clips come from the decoded frames", "err", err)
		return
	}
	w.rec = rec
}

// RingSegment is the length of the evidence ring's segments: short enough
// that a clip starts close to its pre-roll, long enough to hold one key
// frame interval of most cameras (1–2 s, common practice).
const RingSegment = 2 * time.Second

// runRecorder runs the evidence stream's recorder until ctx ends.
func (w *Camera) runRecorder(ctx context.Context) {
	if err := w.rec.Run(ctx); err != nil {
		w.log.Error("evidence stream not recorded", "err", err)
	}
}

// clipWritten reports a clip cut from the evidence stream's ring, and
// applies retention as evidenceWritten does.
func (w *Camera) clipWritten(r remux.ClipResult) {
	if r.Err != nil {
		w.log.Error("evidence clip failed", "err", r.Err)
		return
	}
	// short_by says how much of the pre- or post-roll the ring did not
	// hold (the evidence stream was down, or the daemon had just started).
	short := max(r.From.Sub(r.WantFrom), r.WantTo.Sub(r.To), 0)
	w.log.Info("evidence kept", "kind", "clip", "file", filepath.Base(r.Path), "source", "evidence stream", "segments", r.Segments,
		"from", r.From.UTC().Format(time.RFC3339Nano), "to", r.To.UTC().Format(time.RFC3339Nano), "short_by", short.Round(time.Millisecond),
		"took", r.Took.Round(time.Millisecond))
	w.retain(r.Path)
}
