package pipeline

import (
	"bytes"
	"fmt"
	"image"
	"log/slog"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/homography"
	"stillwater/vision"
)

// zoneCamera sees an 8 m × 4 m pool square-on at 50 px/m: corner A at
// pixel (100, 300), x to the right, pool y up the image.
func zoneCamera(zones ...config.ZoneConfig) config.CameraConfig {
	return config.CameraConfig{
		ID: "pool", Source: "clip.avi",
		CalibrationConfig: config.CalibrationConfig{
			Pool:    config.PoolConfig{Length: 8, Width: 4},
			Corners: [][2]float64{{100, 300}, {500, 300}, {500, 100}, {100, 100}},
		},
		Detect: config.DefaultDetect(),
		Zones:  zones,
	}
}

func TestValidateZones(t *testing.T) {
	ladder := [][2]float64{{7, 1}, {8.2, 1}, {8.2, 2}, {7, 2}}
	tests := []struct {
		name    string
		zones   []config.ZoneConfig
		wantErr string
	}{
		{"none", nil, ""},
		{"pool metres, over the coping", []config.ZoneConfig{{Name: "ladder", PoolM: ladder}}, ""},
		{"pixels", []config.ZoneConfig{{Name: "skimmer", Pixels: [][2]float64{{120, 120}, {160, 120}, {160, 160}}}}, ""},
		{"two points", []config.ZoneConfig{{Name: "a", PoolM: [][2]float64{{1, 1}, {2, 2}}}}, "zones[0] (a).pool_m: 2 points; a zone needs at least 3"},
		{"bow tie", []config.ZoneConfig{{Name: "x", PoolM: [][2]float64{{1, 1}, {2, 2}, {2, 1}, {1, 2}}}}, "pool_m: edges 0 and 2 cross"},
		{"no area", []config.ZoneConfig{{PoolM: [][2]float64{{1, 1}, {2, 1}, {3, 1}}}}, "the outline has no area"},
		{"outside the pool", []config.ZoneConfig{{Name: "shed", PoolM: [][2]float64{{1, 1}, {2, 1}, {2, 6}}}}, "pool_m[2]: (2, 6) lies at (2.00, 6.00) m, outside the 8x4 m pool"},
		{"pixels outside the pool", []config.ZoneConfig{{Name: "deck", Pixels: [][2]float64{{10, 10}, {60, 10}, {60, 60}}}}, "pixels[0]: (10, 10) lies at (-1.80, 5.80) m, outside"},
		{"both frames", []config.ZoneConfig{{Name: "b", PoolM: ladder, Pixels: ladder}}, "both pool_m and pixels given"},
		{"no outline", []config.ZoneConfig{{Name: "empty"}}, "no outline"},
		{"same name twice", []config.ZoneConfig{{Name: "l", PoolM: ladder}, {Name: "l", PoolM: ladder}}, "zones[1] (l).name: \"l\" is used twice"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			cam := zoneCamera(tt.zones...)
			cal, err := config.NewCalibration(cam)
			require.NoError(t, err)
			err = config.ValidateZones("cameras[0] (pool)", cam, cal)
			if tt.wantErr == "" {
				assert.NoError(t, err)
				return
			}
			require.Error(t, err)
			assert.Contains(t, err.Error(), tt.wantErr)
			assert.Contains(t, err.Error(), "cameras[0] (pool).zones[")
		})
	}
}

// TestZoneStep feeds the processor one blob per frame for 2 s: a blob in a
// zone (in pool metres or in pixels) never becomes a track, while the same
// blob in open water does. Both detectors' blobs are fed: the rectified
// one's (already in pool metres, with features) and the mixture models'
// (an outline in pixels).
func TestZoneStep(t *testing.T) {
	zones := []config.ZoneConfig{
		{Name: "ladder", PoolM: [][2]float64{{7, 1}, {8.2, 1}, {8.2, 2}, {7, 2}}},
		{Name: "skimmer", Pixels: [][2]float64{{120, 120}, {160, 120}, {160, 160}, {120, 160}}},
	}
	// A 0.3 m square blob centred on pool (x, y) m, which is pixel
	// (100 + 50x, 300 − 50y).
	blob := func(method string, x, y float64) vision.Blob {
		u, v := 100+50*x, 300-50*y
		b := vision.Blob{
			Centroid: vision.Point{X: u, Y: v},
			Box:      image.Rect(int(u)-8, int(v)-8, int(u)+8, int(v)+8),
			Contour:  []vision.Point{{X: u - 7.5, Y: v - 7.5}, {X: u + 7.5, Y: v - 7.5}, {X: u + 7.5, Y: v + 7.5}, {X: u - 7.5, Y: v + 7.5}},
		}
		if method == "meanvar" {
			b.Plane = &vision.PlaneBlob{X: x, Y: y, Cells: image.Rect(10, 10, 22, 22)}
			b.Features = vision.Features{Area: 0.09, Half: 0.07, Core: 0.05, Score: 200, Peak: 600, Length: 0.3, Width: 0.3, Wet: 1, Edge: 1}
		}
		return b
	}
	tests := []struct {
		name       string
		x, y       float64
		wantTracks bool
		wantLog    string
	}{
		{"ladder zone", 7.5, 1.5, false, "zone=ladder"},
		{"skimmer zone (pixels)", 0.8, 3.2, false, "zone=skimmer"},
		{"open water", 4, 2, true, ""},
		{"just outside the ladder zone", 6.8, 1.5, true, ""},
	}
	for _, method := range []string{"meanvar", "mog2"} {
		for _, tt := range tests {
			t.Run(method+"/"+tt.name, func(t *testing.T) {
				cam := zoneCamera(zones...)
				cam.Detect.Method = method
				var logs bytes.Buffer
				log := slog.New(slog.NewTextHandler(&logs, &slog.HandlerOptions{Level: slog.LevelDebug}))
				cal, err := config.NewCalibration(cam)
				require.NoError(t, err)
				p, err := New(cam, cal, 10, time.Time{}, time.Now, log, nil)
				require.NoError(t, err)
				var msgs []Message
				for i := 0; i < 20; i++ {
					out, _ := p.Step(vision.Result{Index: i, Media: time.Duration(i) * 100 * time.Millisecond, Blobs: []vision.Blob{blob(method, tt.x, tt.y)}}, true)
					msgs = append(msgs, out...)
				}
				if !tt.wantTracks {
					assert.Empty(t, p.Tracks)
					assert.Empty(t, msgs)
					assert.Contains(t, logs.String(), tt.wantLog)
					return
				}
				require.Len(t, p.Tracks, 1)
				assert.NotEmpty(t, msgs, "a blob seen for 2 s in open water alarms")
			})
		}
	}
}

func TestInsidePolygon(t *testing.T) {
	sq := [][2]float64{{0, 0}, {2, 0}, {2, 2}, {0, 2}}
	assert.True(t, insidePolygon(sq, 1, 1))
	assert.False(t, insidePolygon(sq, 3, 1))
	// An L-shape: (1.5, 1.5) is in its notch, outside.
	l := [][2]float64{{0, 0}, {2, 0}, {2, 1}, {1, 1}, {1, 2}, {0, 2}}
	assert.True(t, insidePolygon(l, 0.5, 1.5))
	assert.False(t, insidePolygon(l, 1.5, 1.5))
}

// TestDetectorConfigNamesATooFineGrid: a cell size inside the accepted
// range that makes too many cells for this pool is refused naming the
// setting and the least size that fits, and that size is accepted.
func TestDetectorConfigNamesATooFineGrid(t *testing.T) {
	cam := zoneCamera()
	cam.Pool = config.PoolConfig{Length: 12, Width: 6}
	cam.Detect.Cell = 0.005
	require.NoError(t, config.ValidateDetect("cameras[0]", cam.Detect), "0.005 m is inside the accepted range")
	cal, err := config.NewCalibration(cam)
	require.NoError(t, err)
	_, err = DetectorConfig(cam, cal)
	require.ErrorIs(t, err, homography.ErrGridTooLarge)
	t.Log(err)
	assert.ErrorContains(t, err, "camera pool: detect.cell_m 0.005 m is too small for a 12x6 m pool")
	var least float64
	_, scanErr := fmt.Sscanf(err.Error()[strings.Index(err.Error(), "want at least ")+len("want at least "):], "%g m", &least)
	require.NoError(t, scanErr, err.Error())
	cam.Detect.Cell = least
	_, err = DetectorConfig(cam, cal)
	assert.NoError(t, err, "the suggested %g m", least)
}
