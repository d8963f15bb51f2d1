package pipeline

import (
	"image"
	"io"
	"log/slog"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/cmd/stillwater/internal/config"
	"stillwater/vision"
)

// TestStepClock runs the same frames through a processor with a clock and
// one without: the clock counts the frames searched, not those only
// probed, and changes nothing of what Step decides.
func TestStepClock(t *testing.T) {
	blob := vision.Blob{
		Centroid: vision.Point{X: 300, Y: 200},
		Box:      image.Rect(292, 192, 308, 208),
		Contour:  []vision.Point{{X: 292.5, Y: 192.5}, {X: 307.5, Y: 192.5}, {X: 307.5, Y: 207.5}, {X: 292.5, Y: 207.5}},
	}
	tests := []struct {
		name            string
		searched, probe int
	}{
		{"searched only", 12, 0},
		{"some probed", 12, 3},
		{"probed only", 0, 4},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			cam := zoneCamera()
			cam.Detect.Method = "mog2"
			cal, err := config.NewCalibration(cam)
			require.NoError(t, err)
			log := slog.New(slog.NewTextHandler(io.Discard, nil))
			epoch := time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC)
			now := func() time.Time { return epoch }
			timed, err := New(cam, cal, 10, epoch, now, log, nil)
			require.NoError(t, err)
			plain, err := New(cam, cal, 10, epoch, now, log, nil)
			require.NoError(t, err)
			timed.Clock = &StepClock{}
			var nTimed, nPlain int
			for i := 0; i < tt.probe+tt.searched; i++ {
				r := vision.Result{Index: i, Media: time.Duration(i) * 100 * time.Millisecond, Blobs: []vision.Blob{blob}, Rejoining: i < tt.probe}
				a, _ := timed.Step(r, true)
				b, _ := plain.Step(r, true)
				assert.Equal(t, b, a, "frame %d", i)
				nTimed, nPlain = nTimed+len(a), nPlain+len(b)
			}
			assert.Equal(t, plain.Tracks, timed.Tracks)
			assert.Equal(t, nPlain, nTimed)
			assert.Equal(t, tt.searched, timed.Clock.Frames)
			if tt.searched > 0 {
				// 1.2 s of a body in the water raises an alarm, so the
				// comparison covers the message path too.
				assert.Positive(t, nTimed, "messages")
			}
		})
	}
}
