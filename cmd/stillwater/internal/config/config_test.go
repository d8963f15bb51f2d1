package config

import (
	"fmt"
	"runtime"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

const goodConfig = `
data_dir: /tmp/sw
cameras:
  - id: pool
    source: rtsp://user:pw@127.0.0.1:554/stream1
    transport: udp
    pool: {length_m: 8, width_m: 4}
    corners: [[145, 390], [229, 42], [420, 42], [500, 390]]
    detect:
      persist: 900ms
`

func TestParseConfigMergesDefaults(t *testing.T) {
	cfg, err := ParseConfig([]byte(goodConfig))
	require.NoError(t, err)
	require.Len(t, cfg.Cameras, 1)
	d := cfg.Cameras[0].Detect
	assert.Equal(t, Duration(900*time.Millisecond), d.Persist)
	assert.Equal(t, 640, d.ProcessWidth)
	assert.Equal(t, "meanvar", d.Method)
	assert.Equal(t, MinBodyArea, d.MinArea)
	assert.Equal(t, "127.0.0.1:9310", cfg.HTTP.Listen)
	assert.Equal(t, "stillwater", cfg.Bus.Prefix)
	assert.False(t, cfg.Cameras[0].Deblock, "the deblocking filter is skipped unless asked for")
}

func TestParseConfigErrors(t *testing.T) {
	tests := []struct {
		name, yaml, want string
	}{
		{"unknown key", "data_dir: /x\ncolour: blue\n", `line 2: unknown key "colour" in the top level`},
		{"no cameras", "data_dir: /x\n", "cameras: none configured"},
		{"three corners", `cameras: [{id: p, source: a.avi, pool: {length_m: 8, width_m: 4}, corners: [[0,0],[1,0],[1,1]]}]`, "corners: 3 given"},
		{"negative area", `cameras: [{id: p, source: a.avi, pool: {length_m: 8, width_m: 4}, corners: [[0,0],[100,0],[100,100],[0,100]], detect: {min_area_m2: -1}}]`, "min_area_m2 -1"},
		{"bad duration", `cameras: [{id: p, source: a.avi, pool: {length_m: 8, width_m: 4}, corners: [[0,0],[100,0],[100,100],[0,100]], detect: {persist: soon}}]`, `"soon" is not a duration`},
		{"deblock not a bool", `cameras: [{id: p, source: a.avi, deblock: sometimes, pool: {length_m: 8, width_m: 4}, corners: [[0,0],[100,0],[100,100],[0,100]]}]`, `line 1: "sometimes" is not true or false`},
		{"length not a number", "data_dir: /x\ncameras:\n  - id: p\n    source: a.avi\n    pool: {length_m: long, width_m: 4}\n", `line 5: "long" is not a number`},
		{"dotted id", `cameras: [{id: a.b, source: a.avi, pool: {length_m: 8, width_m: 4}, corners: [[0,0],[1,0],[1,1],[0,1]]}]`, "cameras[0].id"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, err := ParseConfig([]byte(tt.yaml))
			require.Error(t, err)
			assert.Contains(t, err.Error(), tt.want)
		})
	}
}

// Local is the machine's zone under its IANA name, from TZ here; a TZ
// that names no zone is an error once a schedule depends on it.
func TestLocalZoneIsTheSystemZone(t *testing.T) {
	const cam = `
cameras:
  - id: pool
    source: rtsp://192.0.2.10/a
    pool: {length_m: 8, width_m: 4}
    corners: [[145, 390], [229, 42], [420, 42], [500, 390]]
`
	t.Setenv("TZ", "Europe/Berlin")
	cfg, err := ParseConfig([]byte("arming: {schedule: [\"daily 20:00-06:00\"]}" + cam))
	require.NoError(t, err, "Local is the default zone and must work with a schedule")
	sch, err := cfg.Schedules()
	require.NoError(t, err)
	// 19:30 UTC is 21:30 in Berlin in summer (CEST, UTC+2): inside the window.
	assert.True(t, sch["pool"].Armed(time.Date(2026, 7, 1, 19, 30, 0, 0, time.UTC)))
	assert.False(t, sch["pool"].Armed(time.Date(2026, 7, 1, 17, 30, 0, 0, time.UTC)))
	loc, err := cfg.Zone()
	require.NoError(t, err)
	assert.Equal(t, "Europe/Berlin", loc.String())

	t.Setenv("TZ", "Mars/Olympus_Mons")
	_, err = ParseConfig([]byte("arming: {schedule: [\"daily 20:00-06:00\"]}" + cam))
	require.Error(t, err)
	assert.Contains(t, err.Error(), "Mars/Olympus_Mons")
	_, err = ParseConfig([]byte(cam))
	assert.NoError(t, err, "without a schedule the zone does not matter")
}

func TestOpenCVThreads(t *testing.T) {
	most := 4 * runtime.NumCPU()
	tests := []struct {
		name, key string // key is the opencv_threads line, empty for none
		want      int
		err       string
	}{
		{name: "default", want: 1},
		{name: "one", key: "opencv_threads: 1", want: 1},
		{name: "OpenCV's default", key: "opencv_threads: 0", want: 0},
		{name: "two", key: "opencv_threads: 2", want: 2},
		{name: "four per CPU", key: fmt.Sprintf("opencv_threads: %d", most), want: most},
		{name: "negative", key: "opencv_threads: -1", err: fmt.Sprintf("opencv_threads: -1; want 0 (OpenCV's default, one per CPU) to %d", most)},
		{name: "too many", key: fmt.Sprintf("opencv_threads: %d", most+1), err: fmt.Sprintf("opencv_threads: %d; want 0", most+1)},
		{name: "not a number", key: "opencv_threads: two", err: `line 1: "two" is not a whole number`},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			cfg, err := ParseConfig([]byte(tt.key + "\n" + goodConfig))
			if tt.err != "" {
				require.Error(t, err)
				assert.Contains(t, err.Error(), tt.err)
				return
			}
			require.NoError(t, err)
			assert.Equal(t, tt.want, cfg.OpenCVThreads)
		})
	}
}

func TestValidateOpenCVThreads(t *testing.T) {
	tests := []struct {
		n, cpus int
		ok      bool
	}{
		{0, 2, true}, {1, 2, true}, {8, 2, true}, {9, 2, false}, {-1, 2, false}, {32, 8, true}, {33, 8, false},
	}
	for _, tt := range tests {
		t.Run(fmt.Sprintf("%d of %d CPUs", tt.n, tt.cpus), func(t *testing.T) {
			err := validateOpenCVThreads(tt.n, tt.cpus)
			if tt.ok {
				assert.NoError(t, err)
				return
			}
			require.Error(t, err)
			assert.Contains(t, err.Error(), fmt.Sprintf("opencv_threads: %d; want 0 (OpenCV's default, one per CPU) to %d (four per CPU on this machine's %d)", tt.n, 4*tt.cpus, tt.cpus))
		})
	}
}
