package daemon

import (
	"context"
	"errors"
	"image"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/alert/arming"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/cmd/stillwater/internal/console"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/cmd/stillwater/internal/watch"
)

func TestCalibrationErrorPointsAtWhatIsWrong(t *testing.T) {
	tests := []struct {
		msg   string
		field string
		point int
	}{
		// Messages as config.ValidateCalibration and homography words them.
		{"calibration.corners[2] (corner C): (700, 90) is not a pixel inside the frame (frame_px 640×360)", "corners", 2},
		{"corners: corner D is (NaN, 1), not a finite pixel position; click it again", "corners", 3},
		{"calibration.outline[4]: (1, 900) is not a pixel inside the frame", "outline", 4},
		{"calibration.outline: 2 points; give at least 3 or leave it out", "outline", -1},
		{"calibration.pool: length_m 0 and width_m 5 must both be positive metres", "length_m", -1},
		{"calibration.water: depth 8 m is deeper than any residential pool", "depth_m", -1},
		{"corners: the corners cross each other", "corners", -1},
		{"invert homography: singular", "", -1},
	}
	for _, tc := range tests {
		t.Run(tc.msg, func(t *testing.T) {
			var ce *console.CalibrationError
			require.True(t, errors.As(calibrationError(errors.New(tc.msg)), &ce))
			assert.Equal(t, tc.field, ce.Field)
			assert.Equal(t, tc.point, ce.Point)
			assert.Equal(t, tc.msg, ce.Msg, "the whole message is kept")
		})
	}
}

func TestMergeCalibrationKeepsWhatThePageDoesNotEdit(t *testing.T) {
	deep := 2.0
	cur := config.CalibrationConfig{
		Pool: config.PoolConfig{Length: 8, Width: 4}, Reference: []config.ReferencePoint{{}}, CornersOn: "coping", Coping: 0.1,
		Lens:           &config.LensConfig{HFOVDeg: 90},
		CameraPosition: &config.CameraPositionConfig{X: 1, Y: 2, Height: 3},
		Water:          config.WaterConfig{Shallow: 1, Deep: 2, DeepX: &deep}, ReferenceFrame: "ref.png",
	}
	in := console.CalibrationInput{Corners: [][2]float64{{1, 1}, {9, 1}, {9, 5}, {1, 5}}, Outline: [][2]float64{{2, 2}, {8, 2}, {8, 4}}, Length: 10, Width: 5}
	got := mergeCalibration(cur, in, image.Pt(640, 360))
	assert.Equal(t, config.PoolConfig{Length: 10, Width: 5}, got.Pool)
	assert.Equal(t, in.Corners, got.Corners)
	assert.Nil(t, got.Reference, "corners replace reference points")
	assert.Equal(t, in.Outline, got.Outline)
	assert.Equal(t, [2]int{640, 360}, got.Frame)
	assert.Equal(t, cur.Lens, got.Lens)
	assert.Equal(t, cur.CameraPosition, got.CameraPosition)
	assert.Equal(t, "coping", got.CornersOn)
	assert.Equal(t, cur.Water, got.Water, "a depth of 0 keeps a sloping floor")
	assert.Equal(t, "ref.png", got.ReferenceFrame)

	in.Depth = 1.4
	assert.Equal(t, config.WaterConfig{Depth: 1.4}, mergeCalibration(cur, in, image.Pt(640, 360)).Water)
	cur.Water = config.WaterConfig{Depth: 1.2}
	in.Depth = 0
	assert.Equal(t, config.WaterConfig{}, mergeCalibration(cur, in, image.Pt(640, 360)).Water, "and clears a flat one")
}

func TestControlGate(t *testing.T) {
	g := &controlGate{throttle: arming.NewThrottle(time.Millisecond, 5*time.Millisecond, nil)}
	refused := 0
	count := func() { refused++ }
	try := func(auth string) error {
		r := httptest.NewRequest(http.MethodPut, "/console/api/cameras/a/calibration", nil)
		if auth != "" {
			r.Header.Set("Authorization", auth)
		}
		return g.authorize(r, count)
	}
	status := func(err error) int {
		var rf *console.Refusal
		if errors.As(err, &rf) {
			return rf.Status
		}
		return 0
	}
	assert.Equal(t, http.StatusForbidden, status(try("Bearer x")), "no control secret configured")
	g.set("s3cret")
	assert.Equal(t, http.StatusUnauthorized, status(try("")))
	assert.Equal(t, http.StatusUnauthorized, status(try("Bearer guess")))
	assert.Equal(t, http.StatusUnauthorized, status(try("s3cret")), "only a bearer token counts")
	assert.NoError(t, try("Bearer s3cret"))
	assert.Equal(t, 4, refused, "every refusal is counted")
	g.set("n3w")
	assert.Equal(t, http.StatusUnauthorized, status(try("Bearer s3cret")), "a reload's new secret refuses the old one")
	assert.NoError(t, try("Bearer n3w"))
}

type sinkFunc func(context.Context, pipeline.Message) error

func (f sinkFunc) Send(ctx context.Context, m pipeline.Message) error { return f(ctx, m) }

func TestRecordingSinkPassesEverythingOn(t *testing.T) {
	rec := console.NewRecorder(4)
	var passed []string
	s := recordingSink{rec: rec, log: slog.New(slog.NewTextHandler(io.Discard, nil)), next: sinkFunc(func(_ context.Context, m pipeline.Message) error {
		passed = append(passed, m.Kind)
		return nil
	})}
	f, err := alert.Encode(alert.NewFault("a", 1, time.Unix(0, 0), alert.FaultCameraLost, true, ""))
	require.NoError(t, err)
	require.NoError(t, s.Send(context.Background(), pipeline.Message{Camera: "a", Kind: alert.KindFault, Data: f}))
	require.NoError(t, s.Send(context.Background(), pipeline.Message{Camera: "a", Kind: alert.KindTarget, Data: []byte("{")}))
	assert.Equal(t, []string{alert.KindFault, alert.KindTarget}, passed, "a message the page cannot read still goes out")
	assert.Len(t, rec.Events(10), 1)
}

// A camera the watchdog counts as lost is shown as lost, and the page
// is answered at once instead of waiting for a frame.
func TestPageOnALostCamera(t *testing.T) {
	t0 := time.Date(2026, 12, 2, 15, 0, 0, 0, time.UTC)
	at := t0
	now := func() time.Time { return at }
	cfg := reloadFixture(t)
	arm, err := arming.New(arming.Config{Cameras: []string{"north", "south"}}, t0)
	require.NoError(t, err)
	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	p := newPage(cfg, Deps{}, arm, now, log)
	for _, c := range cfg.Cameras {
		p.watches = append(p.watches, watch.New(c, nil, func(time.Time) bool { return true }, now, log, nil, 0, "test", watch.EvidenceSettings{}))
	}
	st := p.Cameras(context.Background())
	require.Len(t, st, 2)
	assert.Equal(t, console.HealthStarting, st[0].Health, "no frame yet, within the frame timeout")
	assert.Equal(t, -1.0, st[0].FrameAge)
	assert.True(t, st[0].Armed)

	at = t0.Add(time.Minute) // past any frame timeout, still no frame
	st = p.Cameras(context.Background())
	assert.Equal(t, console.HealthLost, st[0].Health)
	_, err = p.Overlay(context.Background(), "north")
	assert.ErrorIs(t, err, watch.ErrNoFrame)
	_, err = p.Frame(context.Background(), "south")
	assert.ErrorIs(t, err, watch.ErrNoFrame)
	_, err = p.Overlay(context.Background(), "east")
	assert.ErrorIs(t, err, console.ErrNoCamera)

	err = p.SaveCalibration(context.Background(), "north", console.CalibrationInput{})
	var rf *console.Refusal
	require.ErrorAs(t, err, &rf, "a daemon not started from a file it can rewrite refuses a save")
	assert.Equal(t, http.StatusConflict, rf.Status)
}
