package main

import (
	"fmt"

	"stillwater/alert"
)

// DetectConfig tunes detection and alarming for one camera.
type DetectConfig struct {
	ProcessWidth int      `yaml:"process_width"`
	Method       string   `yaml:"method"`
	History      int      `yaml:"history"`
	Threshold    float64  `yaml:"threshold"`
	MinArea      float64  `yaml:"min_area_m2"`
	MaxArea      float64  `yaml:"max_area_m2"`
	Persist      Duration `yaml:"persist"`
	UpdateEvery  Duration `yaml:"update_every"`
	ClearAfter   Duration `yaml:"clear_after"`
}

// MinChildArea is the default smallest blob, m², that may be a child.
// The WHO Child Growth Standards put a 12-month-old girl's median head
// circumference at 44.9 cm (head diameter about 0.143 m, a top-down disc of
// about 0.016 m²); head and shoulders together seen from above are about
// 0.02–0.06 m² (derived). The default sits below the smallest of these, so
// that a one-year-old's head alone still passes.
const MinChildArea = 0.012

// defaultDetect returns the detection defaults.
func defaultDetect() DetectConfig {
	a := alert.DefaultAlarm()
	return DetectConfig{
		ProcessWidth: 640,
		Method:       "mog2",
		History:      500,
		Threshold:    16,
		MinArea:      MinChildArea,
		MaxArea:      2.5,
		Persist:      Duration(a.Persist),
		UpdateEvery:  Duration(a.UpdateEvery),
		ClearAfter:   Duration(a.ClearAfter),
	}
}

// mergeDetect fills the zero fields of d from def.
func mergeDetect(def, d DetectConfig) DetectConfig {
	if d.ProcessWidth == 0 {
		d.ProcessWidth = def.ProcessWidth
	}
	if d.Method == "" {
		d.Method = def.Method
	}
	if d.History == 0 {
		d.History = def.History
	}
	if d.Threshold == 0 {
		d.Threshold = def.Threshold
	}
	if d.MinArea == 0 {
		d.MinArea = def.MinArea
	}
	if d.MaxArea == 0 {
		d.MaxArea = def.MaxArea
	}
	if d.Persist == 0 {
		d.Persist = def.Persist
	}
	if d.UpdateEvery == 0 {
		d.UpdateEvery = def.UpdateEvery
	}
	if d.ClearAfter == 0 {
		d.ClearAfter = def.ClearAfter
	}
	return d
}

// validateDetect checks a camera's detect section; where names the camera.
func validateDetect(where string, d DetectConfig) error {
	switch d.Method {
	case "mog2", "knn":
	default:
		return fmt.Errorf("%s.detect.method: %q; want mog2 or knn", where, d.Method)
	}
	if d.ProcessWidth < 80 {
		return fmt.Errorf("%s.detect.process_width: %d; want at least 80 px (640 is typical)", where, d.ProcessWidth)
	}
	if d.History < 1 {
		return fmt.Errorf("%s.detect.history: %d; want a positive number of frames", where, d.History)
	}
	if d.Threshold < 0 {
		return fmt.Errorf("%s.detect.threshold: %g; want a positive value", where, d.Threshold)
	}
	if d.MinArea < 0 || d.MaxArea <= d.MinArea {
		return fmt.Errorf("%s.detect: min_area_m2 %g and max_area_m2 %g; want 0 ≤ min < max", where, d.MinArea, d.MaxArea)
	}
	if d.Persist < 0 || d.UpdateEvery <= 0 || d.ClearAfter <= 0 {
		return fmt.Errorf("%s.detect: persist, update_every and clear_after must be positive durations", where)
	}
	return nil
}

// ZoneConfig is one exclusion polygon.
type ZoneConfig struct{}
