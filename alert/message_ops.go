package alert

import "time"

// Fault kinds carried in Fault.Fault.
const (
	FaultCameraLost       = "camera_lost"       // no frames from the camera
	FaultCameraBlinded    = "camera_blinded"    // frames arrive but show nothing usable (glare, dark, covered)
	FaultCameraFrozen     = "camera_frozen"     // the same frame repeats
	FaultCalibrationDrift = "calibration_drift" // the pool corners no longer match the homography
	FaultBusBacklog       = "bus_backlog"       // messages queue up unacknowledged
)

// Fault says a camera or the bus cannot be trusted to see an intruder
// (Active true) or has recovered (Active false). Time is UTC.
type Fault struct {
	V       int       `json:"v"`
	Kind    string    `json:"kind"` // KindFault
	Camera  string    `json:"camera"`
	Seq     uint64    `json:"seq"`
	Time    time.Time `json:"time"`
	Fault   string    `json:"fault"`   // one of the Fault* constants
	Message string    `json:"message"` // for people, not for parsing
	Active  bool      `json:"active"`
}

// ArmedChange says the alarm became armed or disarmed at Time (UTC), and
// why. Until is when a manual override lapses; nil for schedule changes.
type ArmedChange struct {
	V      int        `json:"v"`
	Kind   string     `json:"kind"` // KindArmed
	Time   time.Time  `json:"time"`
	Armed  bool       `json:"armed"`
	Reason string     `json:"reason"`
	Until  *time.Time `json:"until,omitempty"`
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
