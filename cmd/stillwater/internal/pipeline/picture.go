package pipeline

import (
	"fmt"
	"time"

	"stillwater/alert"
	"stillwater/vision"
)

// pictureFaultKinds are the faults the picture checks raise and clear.
var pictureFaultKinds = []string{alert.FaultCameraBlinded, alert.FaultCameraFrozen, alert.FaultCameraNoise}

// faultOf maps a picture condition to its fault kind; "" for a good
// picture.
func faultOf(c vision.Condition) string {
	switch c {
	case vision.CondDark, vision.CondUniform:
		return alert.FaultCameraBlinded
	case vision.CondFrozen:
		return alert.FaultCameraFrozen
	case vision.CondNoise:
		return alert.FaultCameraNoise
	}
	return ""
}

// IsPictureFault reports whether kind is one of pictureFaultKinds.
func IsPictureFault(kind string) bool {
	for _, k := range pictureFaultKinds {
		if k == kind {
			return true
		}
	}
	return false
}

// faultChange is a picture fault raised or cleared.
type faultChange struct {
	Kind   string
	Active bool
	Detail string
}

// PictureFaults turns each frame's picture statistics into camera_blinded,
// camera_frozen and camera_noise raises and clears. The daemon and replay
// both run their frames through it, so a replay shows the faults the
// daemon would send. Not safe for concurrent use.
type PictureFaults struct {
	mon    *vision.HealthMonitor
	active map[string]bool
}

// NewPictureFaults returns the picture checks of one camera.
func NewPictureFaults(cfg vision.HealthConfig) *PictureFaults {
	return &PictureFaults{mon: vision.NewHealthMonitor(cfg), active: map[string]bool{}}
}

// Observe feeds one frame at media time media and returns the faults whose
// state changes. A fault is raised only while armed; a condition that ends
// clears its fault whether armed or not.
func (p *PictureFaults) Observe(media time.Duration, s vision.HealthStats, armed bool) []faultChange {
	rep := p.mon.Observe(media, s)
	want := faultOf(rep.Condition)
	var out []faultChange
	for _, kind := range pictureFaultKinds {
		switch {
		case kind == want && armed && !p.active[kind]:
			p.active[kind] = true
			out = append(out, faultChange{Kind: kind, Active: true, Detail: fmt.Sprintf("picture %s for %.1f s", rep.Condition, (media - rep.Since).Seconds())})
		case kind != want && p.active[kind]:
			p.active[kind] = false
			out = append(out, faultChange{Kind: kind, Active: false})
		}
	}
	return out
}

// Frozen reports whether the picture checks find the picture frozen now,
// armed or not (see Processor.Frozen).
func (p *PictureFaults) Frozen() bool { return p.mon.Condition() == vision.CondFrozen }

// StillSince returns when the water last stopped moving, and whether it is
// still now (see vision.HealthMonitor.StillSince and Processor.StillSince).
func (p *PictureFaults) StillSince() (time.Duration, bool) { return p.mon.StillSince() }
