// Package console serves the homeowner's page: each camera's latest frame
// with the water outline, zones and live tracks drawn over it, camera
// health, the armed state and the next change of the schedule, the recent
// alarms and faults with their evidence, arming controls, and calibration
// by clicking on a frozen frame.
//
// The page (HTML, CSS and JavaScript, embedded) draws its overlay itself
// from the JSON this package serves under APIPrefix. Arm, disarm and
// clear go from the page straight to the daemon's control API, so they
// are authorised, refused and counted exactly as any other client's.
//
// Pixels are those of a camera's full-resolution frame (origin top-left,
// x right, y down); pool metres have their origin at corner A, x along
// the length (A→B), y along the width (A→D).
package console

import (
	"context"
	"errors"
	"fmt"
	"io/fs"
	"time"
)

// APIPrefix is where the JSON API and the evidence files are served;
// AssetPrefix is where the page's script and style sheet are.
const (
	APIPrefix   = "/console/api/"
	AssetPrefix = "/console/"
)

// Backend is what the page shows and changes; the daemon implements it.
// Every method must be safe for concurrent use.
type Backend interface {
	// Cameras returns every camera's status, in the order to show them.
	Cameras(ctx context.Context) []CameraStatus
	// Overlay returns what to draw over a camera's latest frame.
	Overlay(ctx context.Context, camera string) (Overlay, error)
	// Frame returns a camera's latest frame, undrawn, as a JPEG.
	Frame(ctx context.Context, camera string) (Frame, error)
	// Events returns at most n recent alarms and faults, newest first.
	Events(ctx context.Context, n int) []Event
	// Evidence holds the snapshots and clips that Event names refer to;
	// nil when evidence is not kept.
	Evidence() fs.FS
	// Calibration returns a camera's calibration as it stands, in the
	// page's terms (Origin 0).
	Calibration(ctx context.Context, camera string) (CalibrationInput, error)
	// PreviewCalibration solves in without keeping it. An error the page
	// can point at is a *CalibrationError.
	PreviewCalibration(ctx context.Context, camera string, in CalibrationInput) (Preview, error)
	// SaveCalibration validates in as stillwater calibrate does, writes it
	// to the configuration and has the daemon reload it. Errors as for
	// PreviewCalibration; nothing is written when one is returned.
	SaveCalibration(ctx context.Context, camera string, in CalibrationInput) error
}

// ErrNoCamera is returned (wrapped) by a Backend for an unknown camera id.
var ErrNoCamera = errors.New("no such camera")

// Health is a camera's state in one word.
type Health string

// Camera health, worst last.
const (
	HealthWatching Health = "watching" // frames arrive, no fault
	HealthStarting Health = "starting" // no frame yet, within the start-up allowance
	HealthFaulty   Health = "faulty"   // frames arrive but a fault is active
	HealthLost     Health = "lost"     // no frames
)

// CameraStatus is one camera as the page shows it.
type CameraStatus struct {
	ID     string  `json:"id"`
	Health Health  `json:"health"`
	Faults []Fault `json:"faults"`
	// FPS is frames read per second over the last few seconds.
	FPS float64 `json:"fps"`
	// FrameAge is how long ago the latest frame was read, seconds; -1
	// before the first frame.
	FrameAge float64 `json:"frame_age_s"`
	Armed    bool    `json:"armed"`
	// ArmedWhy says in words why the camera is (dis)armed: the schedule,
	// an operator's override and its end, or fail-safe.
	ArmedWhy string `json:"armed_why"`
	// NextChange is when the armed state changes next without anyone
	// acting; nil for never.
	NextChange *time.Time `json:"next_change,omitempty"`
	// Override is set while an operator's arm or disarm holds.
	Override bool `json:"override"`
	// Frame is the full-resolution frame size [width, height] in pixels;
	// zero before the first frame.
	Frame [2]int `json:"frame_px"`
}

// Fault is an active camera fault.
type Fault struct {
	Kind   string    `json:"kind"`
	Detail string    `json:"detail"` // words, for the homeowner
	Since  time.Time `json:"since"`
}

// Overlay is what is drawn over a frame, in frame pixels.
type Overlay struct {
	Frame   [2]int       `json:"frame_px"`
	Outline [][2]float64 `json:"outline"` // the water's edge, closed
	Zones   []Zone       `json:"zones"`
	Tracks  []Track      `json:"tracks"`
	// Ignored counts the tracks not shown: changes on the water the
	// detector does not take for a person (ripples, glints, small
	// floating things).
	Ignored int `json:"ignored"`
}

// Zone is an excluded area (a ladder, a fountain).
type Zone struct {
	Name   string       `json:"name"`
	Pixels [][2]float64 `json:"pixels"`
}

// Track is a live track: its box and foot point in pixels, and its
// position in pool metres on the water surface.
type Track struct {
	ID    int        `json:"id"`
	Box   [4]float64 `json:"box"` // x, y, width, height in pixels
	At    [2]float64 `json:"at"`  // pixels
	X     float64    `json:"x_m"`
	Y     float64    `json:"y_m"`
	Alarm bool       `json:"alarm"` // the track has raised an alarm
}

// Frame is a camera's latest frame.
type Frame struct {
	JPEG  []byte
	Seq   uint64    // frames read before it, to tell frames apart
	Taken time.Time // when it was read
}

// Event kinds.
const (
	EventAlarm        = "alarm"
	EventAlarmCleared = "alarm_cleared"
	EventFault        = "fault"
	EventFaultCleared = "fault_cleared"
)

// Event is an alarm or a fault, raised or cleared.
type Event struct {
	ID     string    `json:"id"`
	Kind   string    `json:"kind"`
	Camera string    `json:"camera"`
	Time   time.Time `json:"time"`
	// Text says what happened in words.
	Text string `json:"text"`
	// Track and Position (pool metres) are an alarm's.
	Track    int         `json:"track,omitempty"`
	Position *[2]float64 `json:"position_m,omitempty"`
	// Snapshot and Clip are paths in Backend.Evidence, "" when none.
	Snapshot string `json:"snapshot,omitempty"`
	Clip     string `json:"clip,omitempty"`
	// Why are the features the detector judged the alarm on.
	Why []Feature `json:"why,omitempty"`
}

// Feature is one measured property of a detection, with its unit.
type Feature struct {
	Name  string `json:"name"`
	Value string `json:"value"`
}

// CalibrationInput is what the page's calibration editor sends: four
// corners clicked in order round the pool, which of them is the origin,
// the water's edge, and the pool's size.
type CalibrationInput struct {
	Corners [][2]float64 `json:"corners"`
	// Origin is the index in Corners of corner A; the corner clicked
	// after it is B, along the length.
	Origin  int          `json:"origin"`
	Outline [][2]float64 `json:"outline,omitempty"`
	Length  float64      `json:"length_m"`
	Width   float64      `json:"width_m"`
	// Depth is a flat floor's depth in metres, 0 for none.
	Depth float64 `json:"depth_m,omitempty"`
}

// ordered returns in with its corners in A, B, C, D order and Origin 0.
func (in CalibrationInput) ordered() CalibrationInput {
	n := len(in.Corners)
	if n == 0 || in.Origin == 0 {
		in.Origin = 0
		return in
	}
	c := make([][2]float64, n)
	for i := range c {
		c[i] = in.Corners[(i+in.Origin)%n]
	}
	in.Corners, in.Origin = c, 0
	return in
}

// check catches what the page can send wrong before the backend solves
// anything; the backend's validation is the full one.
func (in CalibrationInput) check() error {
	if len(in.Corners) != 4 {
		return &CalibrationError{Field: "corners", Point: -1, Msg: fmt.Sprintf("%d corners given; click the 4 corners of the pool", len(in.Corners))}
	}
	if in.Origin < 0 || in.Origin > 3 {
		return &CalibrationError{Field: "origin", Point: -1, Msg: fmt.Sprintf("origin %d: pick one of the 4 corners (0–3)", in.Origin)}
	}
	return nil
}

// Preview is a solved calibration, for the installer to check by eye.
type Preview struct {
	Frame [2]int `json:"frame_px"`
	// Corners are A, B, C, D as used (the backend may swap C and D
	// clicked in crossed order).
	Corners [][2]float64 `json:"corners"`
	// Grid are pixel polylines along every whole metre of the pool, the
	// pool's sides included.
	Grid [][][2]float64 `json:"grid"`
	// AxisX and AxisY run 1 m from corner A along x and y, in pixels.
	AxisX [][2]float64 `json:"axis_x"`
	AxisY [][2]float64 `json:"axis_y"`
	// NearMPP and FarMPP are metres per pixel at the corners nearest to
	// and farthest from the camera, named by NearCorner and FarCorner.
	NearMPP    float64 `json:"near_m_per_px"`
	FarMPP     float64 `json:"far_m_per_px"`
	NearCorner string  `json:"near_corner"`
	FarCorner  string  `json:"far_corner"`
	// Rectified is the top-down view of the pool as a JPEG (JSON base64);
	// PPM its pixels per metre.
	Rectified []byte  `json:"rectified_jpeg,omitempty"`
	PPM       float64 `json:"rectified_px_per_m,omitempty"`
	// Notes are warnings that do not stop a save.
	Notes []string `json:"notes,omitempty"`
}

// CalibrationError is a calibration the backend refused, naming what the
// page should mark: Field is "corners", "outline", "length_m", "width_m",
// "depth_m" or "" for the whole; Point the index in that list, -1 for
// none. For corners Point counts in the order A, B, C, D.
type CalibrationError struct {
	Field string
	Point int
	Msg   string
}

func (e *CalibrationError) Error() string {
	switch {
	case e.Field == "":
		return e.Msg
	case e.Point >= 0:
		return fmt.Sprintf("%s[%d]: %s", e.Field, e.Point, e.Msg)
	}
	return e.Field + ": " + e.Msg
}

// Refusal is an Authorize error with the HTTP status to answer.
type Refusal struct {
	Status int
	Why    string
}

func (r *Refusal) Error() string { return "refused: " + r.Why }
