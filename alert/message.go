// Package alert decides when a tracked object is an alarm and says so on
// the wire: alarm decisions, the wire messages with their JSON Schemas,
// and the subjects they and control requests travel on. Arming (schedules,
// overrides, control) lives in alert/arming and the bus (embedded server,
// roles, publisher, outbox) in alert/bus. Positions are pool metres
// (origin at corner A, x along the length, y along the width); times are
// UTC.
package alert

import (
	"encoding/json"
	"fmt"
	"strings"
	"time"
)

// Version is the wire-format version every message carries in "v".
const Version = 1

// Message kinds, also the last token of each subject.
const (
	KindTarget  = "target"
	KindCleared = "cleared"
	KindFault   = "fault"
	KindArmed   = "armed"
	KindBeat    = "heartbeat"
)

// Position is a point in pool metres.
type Position struct {
	X float64 `json:"x_m"`
	Y float64 `json:"y_m"`
}

// FloorPosition is the point on the pool floor under a target, with the
// depth of water assumed there.
type FloorPosition struct {
	X     float64 `json:"x_m"`
	Y     float64 `json:"y_m"`
	Depth float64 `json:"depth_m"`
}

// Velocity is in metres per second in the pool frame.
type Velocity struct {
	X float64 `json:"x_mps"`
	Y float64 `json:"y_mps"`
}

// Target says an intruder is in the water and where. Event is "start" for
// the first message of an alarm and "update" for the re-aim messages after.
// Confidence is the share, 0–1, of the frames since the track began in
// which it was detected, scaled down while it is still young (dwell under
// twice the persistence time).
type Target struct {
	V          int           `json:"v"`
	Kind       string        `json:"kind"`
	Camera     string        `json:"camera"`
	Track      int           `json:"track"`
	Seq        uint64        `json:"seq"`
	Event      string        `json:"event"`
	Time       time.Time     `json:"time"`
	FrameTime  time.Time     `json:"frame_time"`
	Frame      int           `json:"frame"`
	Surface    Position      `json:"surface"`
	Floor      FloorPosition `json:"floor"`
	Area       float64       `json:"area_m2"`
	Velocity   Velocity      `json:"velocity"`
	Dwell      float64       `json:"dwell_s"`
	Confidence float64       `json:"confidence"`
	Evidence   string        `json:"evidence,omitempty"`
}

// Cleared says a target has not been seen for the clearing time.
type Cleared struct {
	V         int       `json:"v"`
	Kind      string    `json:"kind"`
	Camera    string    `json:"camera"`
	Track     int       `json:"track"`
	Seq       uint64    `json:"seq"`
	Time      time.Time `json:"time"`
	FrameTime time.Time `json:"frame_time"`
	Frame     int       `json:"frame"`
	Last      Position  `json:"last_surface"`
	Duration  float64   `json:"duration_s"`
}

// Subject returns the subject for a kind of message from a camera:
// PREFIX.CAMERA.KIND, so that PREFIX.*.target selects targets of every
// camera and PREFIX.CAMERA.> everything of one camera.
func Subject(prefix, camera, kind string) string {
	return prefix + "." + camera + "." + kind
}

// ValidToken reports whether s can be one subject token: non-empty, no dots,
// wildcards or white space.
func ValidToken(s string) error {
	if s == "" {
		return fmt.Errorf("empty")
	}
	if strings.ContainsAny(s, ".*> \t\r\n") {
		return fmt.Errorf("%q contains one of . * > or white space", s)
	}
	return nil
}

// Encode marshals a message in its wire form: compact JSON, no trailing
// newline.
func Encode(m any) ([]byte, error) {
	b, err := json.Marshal(m)
	if err != nil {
		return nil, fmt.Errorf("encode message: %w", err)
	}
	return b, nil
}
