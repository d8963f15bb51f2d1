package main

import (
	"io"
	"log/slog"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
)

func reloadFixture(t *testing.T) Config {
	t.Helper()
	cfg, err := ParseConfig([]byte(`
arming: {time_zone: UTC, schedule: ["daily 20:00-06:00"]}
cameras:
  - id: north
    source: rtsp://192.0.2.10/a
    pool: {length_m: 8, width_m: 4}
    corners: [[145, 390], [229, 42], [420, 42], [500, 390]]
  - id: south
    source: rtsp://192.0.2.11/a
    pool: {length_m: 8, width_m: 4}
    corners: [[145, 390], [229, 42], [420, 42], [500, 390]]
`))
	require.NoError(t, err)
	return cfg
}

// TestApplyReload checks what SIGHUP changes: a running camera gets its
// new calibration and detection settings, a camera whose source changed
// keeps running unchanged, and the schedule is swapped.
func TestApplyReload(t *testing.T) {
	old := reloadFixture(t)
	sch, err := old.schedules()
	require.NoError(t, err)
	arm, err := alert.NewArming(alert.ArmingConfig{Cameras: []string{"north", "south"}, Schedules: sch}, time.Now())
	require.NoError(t, err)
	armed := func(id string, at time.Time) bool { a, _ := arm.Armed(id, at); return a }
	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	var watches []*cameraWatch
	for _, c := range old.Cameras {
		watches = append(watches, newCameraWatch(c, nil, func(time.Time) bool { return true }, time.Now, log, nil, 0, "test", evidenceSettings{}))
	}
	noon := time.Date(2026, 7, 1, 12, 0, 0, 0, time.UTC)
	require.False(t, armed("north", noon), "the old schedule is disarmed at noon")

	next := reloadFixture(t)
	next.Cameras[0].Detect.MinArea = 0.05
	next.Cameras[1].Source = "rtsp://192.0.2.99/b"
	next.Arming.Schedule = []string{"daily 00:00-24:00"}
	require.NoError(t, next.Validate())
	applyReload(log, old, next, watches, func(s map[string]*alert.Schedule) error { return arm.SetSchedules(nil, s, noon) })

	select {
	case c := <-watches[0].reload:
		assert.Equal(t, 0.05, c.Detect.MinArea)
	default:
		t.Fatal("north got no reload")
	}
	select {
	case <-watches[1].reload:
		t.Fatal("south changed source; it must not be reloaded in place")
	default:
	}
	assert.True(t, armed("north", noon), "the new schedule arms around the clock")
}
