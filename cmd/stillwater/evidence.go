package main

import (
	"fmt"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"time"

	"stillwater/alert"
	"stillwater/vision"
)

// evidenceSettings is what a camera keeps for each alarm.
type evidenceSettings struct {
	on                bool
	dir               string // data_dir/evidence
	preRoll, postRoll time.Duration
	keep              vision.Retention
}

func newEvidenceSettings(cfg Config) evidenceSettings {
	e := cfg.Evidence
	return evidenceSettings{
		on:       e.on(),
		dir:      filepath.Join(cfg.DataDir, "evidence"),
		preRoll:  time.Duration(e.PreRoll),
		postRoll: time.Duration(e.PostRoll),
		keep:     vision.Retention{MaxFiles: e.MaxFiles, MaxBytes: e.MaxMB << 20, MaxAge: time.Duration(e.MaxAge)},
	}
}

// annotation draws the water outline and every live track with its
// position in pool metres.
func annotation(cam CameraConfig, proc *processor, caption string) vision.Annotation {
	a := vision.Annotation{Outline: proc.cal.mask(), Caption: caption}
	for _, t := range proc.tracks {
		a.Boxes = append(a.Boxes, vision.LabeledBox{Box: t.Box, Label: fmt.Sprintf("track %d  %.2f m, %.2f m%s", t.ID, t.X, t.Y, proc.why(t.ID))})
	}
	return a
}

// saveEvidence writes the annotated frame and starts (or extends) the clip
// for an alarm that starts now. It returns the snapshot's path relative to
// the data directory, for the target message, or "" when nothing could be
// kept: a failure here is logged and never holds up the alarm.
func (w *cameraWatch) saveEvidence(vc *vision.Camera, proc *processor, r vision.Result, o alert.Observation) string {
	if !w.evidence.on {
		return ""
	}
	if err := os.MkdirAll(w.evidence.dir, 0o750); err != nil {
		w.log.Error("evidence directory", "err", err)
		return ""
	}
	stamp := w.epoch.Add(r.Media).UTC().Format("20060102T150405.000Z")
	stamp = strings.ReplaceAll(stamp, ".", "")
	base := fmt.Sprintf("%s-%s-track%d", w.cam.ID, stamp, o.Track)
	caption := fmt.Sprintf("%s  %s  track %d at %.2f m, %.2f m", w.cam.ID, w.epoch.Add(r.Media).UTC().Format(time.RFC3339), o.Track, o.X, o.Y)
	jpg, err := vc.Snapshot(annotation(w.cam, proc, caption))
	if err != nil {
		w.log.Error("evidence snapshot", "err", err)
		return ""
	}
	name := base + ".jpg"
	if err := os.WriteFile(filepath.Join(w.evidence.dir, name), jpg, 0o640); err != nil {
		w.log.Error("evidence snapshot", "err", err)
		return ""
	}
	clip, err := vc.StartClip(filepath.Join(w.evidence.dir, base+".avi"))
	if err != nil {
		w.log.Error("evidence clip", "err", err)
	}
	keep := w.evidence.keep
	keep.Keep = []string{filepath.Join(w.evidence.dir, name), clip.Path}
	if n, err := vision.PruneEvidence(w.evidence.dir, keep, w.now()); err != nil {
		w.log.Error("evidence retention", "err", err)
	} else if n > 0 {
		w.log.Info("old evidence removed", "files", n)
	}
	w.log.Info("evidence kept", "snapshot", name, "clip", filepath.Base(clip.Path), "extended", clip.Extended)
	return filepath.Join("evidence", name)
}

// answerSnapshot serves a pending request for the latest annotated frame.
// Only the capture goroutine may touch the camera, so HTTP asks it here.
func (w *cameraWatch) answerSnapshot(vc *vision.Camera, proc *processor) {
	select {
	case reply := <-w.snapReq:
		caption := fmt.Sprintf("%s  %s", w.cam.ID, w.now().UTC().Format(time.RFC3339))
		jpg, err := vc.Snapshot(annotation(w.cam, proc, caption))
		reply <- snapshot{jpg: jpg, err: err}
	default:
	}
}

type snapshot struct {
	jpg []byte
	err error
}

// latestHandler serves GET /cameras/{id}/latest.jpg: the camera's latest
// frame with the outline and tracks drawn.
func latestHandler(watches []*cameraWatch) http.Handler {
	return http.HandlerFunc(func(rw http.ResponseWriter, req *http.Request) {
		id := req.PathValue("id")
		for _, w := range watches {
			if w.cam.ID != id {
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
