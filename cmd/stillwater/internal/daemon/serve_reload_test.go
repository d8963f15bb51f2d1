package daemon

import (
	"io"
	"log/slog"
	"slices"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert/arming"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/watch"
)

func reloadFixture(t *testing.T) config.Config {
	t.Helper()
	cfg, err := config.ParseConfig([]byte(`
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
	sch, err := old.Schedules()
	require.NoError(t, err)
	arm, err := arming.New(arming.Config{Cameras: []string{"north", "south"}, Schedules: sch}, time.Now())
	require.NoError(t, err)
	armed := func(id string, at time.Time) bool { a, _ := arm.Armed(id, at); return a }
	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	var watches []*watch.Camera
	for _, c := range old.Cameras {
		watches = append(watches, watch.New(c, nil, func(time.Time) bool { return true }, time.Now, log, nil, 0, "test", watch.EvidenceSettings{}))
	}
	noon := time.Date(2026, 7, 1, 12, 0, 0, 0, time.UTC)
	require.False(t, armed("north", noon), "the old schedule is disarmed at noon")

	next := reloadFixture(t)
	next.Cameras[0].Detect.MinArea = 0.05
	next.Cameras[1].Source = "rtsp://192.0.2.99/b"
	next.Arming.Schedule = []string{"daily 00:00-24:00"}
	require.NoError(t, next.Validate())
	newReloader(log, old, access{}, reloadTargets{watches: watches,
		setSchedules: func(s map[string]*arming.Schedule) error { return arm.SetSchedules(nil, s, noon) }}).apply(next)

	select {
	case c := <-watches[0].Reload:
		assert.Equal(t, 0.05, c.Detect.MinArea)
	default:
		t.Fatal("north got no reload")
	}
	select {
	case <-watches[1].Reload:
		t.Fatal("south changed source; it must not be reloaded in place")
	default:
	}
	assert.True(t, armed("north", noon), "the new schedule arms around the clock")
}

// Each setting a reload cannot apply in place is named; each it applies
// is not.
func TestReloadNamesWhatNeedsARestart(t *testing.T) {
	cases := []struct {
		name    string
		edit    func(*config.Config)
		restart []string
		live    bool
	}{
		{"schedule", func(c *config.Config) { c.Arming.Schedule = []string{"daily 00:00-24:00"} }, nil, true},
		{"control", func(c *config.Config) { c.Control.SecretEnv, c.Control.MaxDisarm = "X", config.Duration(time.Hour) }, nil, true},
		{"viewer token", func(c *config.Config) { c.HTTP.ViewerSecretFile = "/run/v" }, nil, true},
		{"gating", func(c *config.Config) { c.Cameras[0].Detect.MinArea = 0.05 }, nil, true},
		{"zones", func(c *config.Config) { c.Cameras[0].Zones = []config.ZoneConfig{{Name: "ladder"}} }, nil, true},
		{"listen", func(c *config.Config) { c.HTTP.Listen = "0.0.0.0:9310" }, []string{"http.listen"}, false},
		{"bus", func(c *config.Config) { c.Bus.Prefix, c.Bus.Stream.Name = "pool", "POOL" }, []string{"bus.stream.name", "bus.subject_prefix"}, false},
		{"log", func(c *config.Config) { c.Log.Level = "debug" }, []string{"log.level"}, false},
		{"model", func(c *config.Config) { c.Cameras[1].Detect.History = 100 }, []string{"cameras[south].detect.history"}, false},
		{"frame timeout", func(c *config.Config) { c.Cameras[0].FrameTimeout = config.Duration(5 * time.Second) }, []string{"cameras[north].frame_timeout"}, false},
		{"corners", func(c *config.Config) { c.Cameras[0].Corners[1] = [2]float64{235, 40} },
			[]string{"cameras[north] water outline of the detector (calibration)"}, true},
		{"camera added", func(c *config.Config) {
			n := c.Cameras[0]
			n.ID = "east"
			c.Cameras = append(c.Cameras, n)
		}, []string{"cameras[east] (added)"}, false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			old, next := reloadFixture(t), reloadFixture(t)
			tc.edit(&next)
			keys := changedKeys(old, next)
			require.NotEmpty(t, keys)
			got := restartKeys(old, next)
			slices.Sort(got)
			assert.Equal(t, tc.restart, got)
			if tc.live {
				assert.True(t, slices.ContainsFunc(keys, liveKey), "%v applied in place", keys)
			}
		})
	}
}
