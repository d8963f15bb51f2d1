package pipeline

import (
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/vision"
)

// Alarmed reports whether track id has raised an alarm not yet cleared.
func (p *Processor) Alarmed(id int) bool { return p.alarmed[id] }

// Judged returns what track id's alarm is (or would be) judged on: the
// medians of its features over the judge's window, how many candidates
// they come from (0 when none, and always for the mixture-model
// detectors), and its speed, m/s.
func (p *Processor) Judged(id int) (f vision.Features, n int, speed float64) {
	if p.cam.Detect.Method != "meanvar" {
		return vision.Features{}, 0, 0
	}
	return p.judge.summary(id)
}

// MayAlarm reports whether track id is one the alarm logic considers:
// for the rectified detector, a track the judge has not set aside as
// water, a glint or too small; for the mixture-model detectors, every
// track.
func (p *Processor) MayAlarm(id int) bool {
	if p.cam.Detect.Method != "meanvar" || p.alarmed[id] {
		return true
	}
	ok, _ := p.judge.eligible(id)
	return ok
}

// Camera returns the settings the processor runs with: those of the
// latest reload, which the watcher's own copy does not follow.
func (p *Processor) Camera() config.CameraConfig { return p.cam }
