package alert

import (
	"fmt"
	"time"
)

// Fault kinds carried in Fault.Fault.
const (
	FaultCameraLost       = "camera_lost"       // no frames from the camera
	FaultCameraBlinded    = "camera_blinded"    // frames arrive but show nothing usable (glare, dark, covered)
	FaultCameraFrozen     = "camera_frozen"     // the same frame repeats
	FaultCameraNoise      = "camera_noise"      // frames are so noisy that motion cannot be told from noise
	FaultCalibrationDrift = "calibration_drift" // the pool corners no longer match the homography
	FaultBusBacklog       = "bus_backlog"       // messages queue up unacknowledged
	FaultProcessingLag    = "processing_lag"    // frames are searched over a second after they were captured
)

// FaultKinds lists every fault kind, in the order of the schema's enum.
func FaultKinds() []string {
	return []string{FaultCameraLost, FaultCameraBlinded, FaultCameraFrozen, FaultCameraNoise, FaultCalibrationDrift, FaultBusBacklog, FaultProcessingLag}
}

// Fault says a camera or the bus cannot be trusted to see an intruder
// (Active true) or has recovered (Active false). Time is UTC. Shift is set
// only for calibration_drift: how far, in pool metres, the corners appear to
// have moved.
type Fault struct {
	V       int       `json:"v"`
	Kind    string    `json:"kind"` // KindFault
	Camera  string    `json:"camera"`
	Seq     uint64    `json:"seq"`
	Time    time.Time `json:"time"`
	Fault   string    `json:"fault"`   // one of the Fault* constants
	Message string    `json:"message"` // for people, not for parsing
	Active  bool      `json:"active"`
	Shift   *float64  `json:"shift_m,omitempty"`
}

// FaultMessage returns the human sentence for a fault kind, raised
// (active) or recovered. detail, when not empty, is appended after a colon
// (a measured value, say). Unknown kinds get a generic sentence naming them.
func FaultMessage(fault string, active bool, detail string) string {
	var s string
	switch fault {
	case FaultCameraLost:
		s = pick(active, "no frames from the camera: the pool is not watched", "frames from the camera again")
	case FaultCameraBlinded:
		s = pick(active, "the camera sees nothing usable (glare, darkness or a covered lens): the pool is not watched", "the camera image is usable again")
	case FaultCameraFrozen:
		s = pick(active, "the camera repeats the same frame: the pool is not watched", "the camera image moves again")
	case FaultCameraNoise:
		s = pick(active, "the camera image is too noisy to tell a person from noise: detection is unreliable", "the camera image is clean enough again")
	case FaultCalibrationDrift:
		s = pick(active, "the pool corners no longer match the calibration: positions are off, recalibrate", "the pool corners match the calibration again")
	case FaultBusBacklog:
		s = pick(active, "messages are queueing unacknowledged: the bus is unreachable or slow", "queued messages are delivered again")
	case FaultProcessingLag:
		s = pick(active, "frames are searched over a second after the camera took them, so alarms come late", "frames are searched in time again")
	default:
		s = pick(active, fmt.Sprintf("fault %q raised", fault), fmt.Sprintf("fault %q cleared", fault))
	}
	if detail != "" {
		s += ": " + detail
	}
	return s
}

func pick(c bool, a, b string) string {
	if c {
		return a
	}
	return b
}

// NewFault builds a fault message with the standard human sentence. Time
// is converted to UTC.
func NewFault(camera string, seq uint64, at time.Time, fault string, active bool, detail string) Fault {
	return Fault{V: Version, Kind: KindFault, Camera: camera, Seq: seq, Time: at.UTC(), Fault: fault,
		Message: FaultMessage(fault, active, detail), Active: active}
}

// NewDriftFault builds a calibration_drift fault carrying the apparent
// corner shift in pool metres.
func NewDriftFault(camera string, seq uint64, at time.Time, active bool, shiftM float64) Fault {
	f := NewFault(camera, seq, at, FaultCalibrationDrift, active, fmt.Sprintf("corners moved %.2f m", shiftM))
	f.Shift = &shiftM
	return f
}

// FaultID is the de-duplication id of a fault message: stable for the same
// camera, sequence and start epoch of the sender.
func FaultID(f Fault, epoch time.Time) string {
	return fmt.Sprintf("%s-%d-%d-fault", f.Camera, epoch.UnixNano(), f.Seq)
}

// ArmedChange says the alarm of one camera became armed or disarmed at Time
// (UTC), and why. It goes to PREFIX.CAMERA.armed. Until is when a manual
// override lapses; nil for schedule changes. By names who set the override.
type ArmedChange struct {
	V      int        `json:"v"`
	Kind   string     `json:"kind"` // KindArmed
	Camera string     `json:"camera"`
	Time   time.Time  `json:"time"`
	Armed  bool       `json:"armed"`
	Reason string     `json:"reason"`
	Until  *time.Time `json:"until,omitempty"`
	By     string     `json:"by,omitempty"`
}

// ArmedID is the de-duplication id of an armed change.
func ArmedID(c ArmedChange) string {
	return fmt.Sprintf("%s-%d-%t-armed", c.Camera, c.Time.UnixNano(), c.Armed)
}

// Heartbeat is a camera's periodic sign of life. Time is UTC, FPS is the
// measured frame rate in frames per second, Version is the software
// version (V is the wire format's).
type Heartbeat struct {
	V        int       `json:"v"`
	Kind     string    `json:"kind"` // KindBeat
	Camera   string    `json:"camera"`
	Time     time.Time `json:"time"`
	FPS      float64   `json:"fps"`
	CameraOK bool      `json:"camera_ok"`
	Armed    bool      `json:"armed"`
	Version  string    `json:"version"`
}
