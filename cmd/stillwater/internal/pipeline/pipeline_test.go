package pipeline

import (
	"image"
	"io"
	"log/slog"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/config"
	"stillwater/vision"
	"stillwater/vision/synth"
)

// TestStepForgetsTracksWhenModelRestarts feeds a mixture-model blob in
// open water for 1 s, then frames only probed after a reconnect (see
// vision.Result.Rejoining), then the blob again. When the probing ends
// with the background model started again, its old blobs are no evidence
// for the tracks: the blob starts a new track. When the kept model is
// trusted again, the track goes on.
func TestStepForgetsTracksWhenModelRestarts(t *testing.T) {
	// A 0.3 m square blob at pool (4, 2) m, pixel (300, 200) for
	// zoneCamera.
	blob := openWaterBlob()
	tests := []struct {
		rejoined string
		wantID   int
	}{
		{vision.RejoinKept, 1},
		{vision.RejoinRebuilt, 2},
		{vision.RejoinForced, 2},
	}
	for _, tt := range tests {
		t.Run(tt.rejoined, func(t *testing.T) {
			cam := zoneCamera()
			cam.Detect.Method = "mog2"
			cal, err := config.NewCalibration(cam)
			require.NoError(t, err)
			p, err := New(cam, cal, 10, time.Time{}, time.Now, slog.New(slog.NewTextHandler(io.Discard, nil)), nil)
			require.NoError(t, err)
			media := func(i int) time.Duration { return time.Duration(i) * 100 * time.Millisecond }
			for i := 0; i < 10; i++ {
				p.Step(vision.Result{Index: i, Media: media(i), Blobs: []vision.Blob{blob}}, true)
			}
			require.Len(t, p.Tracks, 1)
			require.Equal(t, 1, p.Tracks[0].ID)
			p.Step(vision.Result{Index: 10, Media: media(10), Rejoining: true}, true)
			p.Step(vision.Result{Index: 11, Media: media(11), Rejoining: true, Rejoined: tt.rejoined}, true)
			p.Step(vision.Result{Index: 12, Media: media(12), Blobs: []vision.Blob{blob}}, true)
			require.NotEmpty(t, p.Tracks)
			assert.Equal(t, tt.wantID, p.Tracks[0].ID, "the track seen after the probing")
		})
	}
}

// newTestProcessor returns the pipeline of cam, at 10 fps, logging
// nowhere.
func newTestProcessor(t *testing.T, cam config.CameraConfig) *Processor {
	t.Helper()
	cal, err := config.NewCalibration(cam)
	require.NoError(t, err)
	p, err := New(cam, cal, 10, time.Time{}, time.Now, slog.New(slog.NewTextHandler(io.Discard, nil)), nil)
	require.NoError(t, err)
	return p
}

// TestGateUprightInTheWater: a candidate whose centre lies beyond the
// pool's edge but whose end nearest the camera is on the water is a body
// upright in the water, its upper part seen reaching over the deck (as a
// child wading in at the far end of the development set's H7, seen from a
// camera 2.5 m up); it is placed where it meets the water. Its end on the
// deck, or too little of it on the water, and it stays outside.
func TestGateUprightInTheWater(t *testing.T) {
	for _, c := range []struct {
		name string
		foot float64
		wet  float64
		near *vision.Point
		ok   bool
	}{
		{"near end on the water", 0, 0.4, &vision.Point{X: 7.7, Y: 2}, true},
		{"near end on the deck", 0.2, 0.4, &vision.Point{X: 8.1, Y: 2}, false},
		{"hardly on the water", 0, 0.1, &vision.Point{X: 7.9, Y: 2}, false},
		{"camera position not known", 0, 0.4, nil, false},
	} {
		t.Run(c.name, func(t *testing.T) {
			cam := zoneCamera()
			p := newTestProcessor(t, cam)
			f := body()
			f.Foot, f.Wet = c.foot, c.wet
			b := vision.Blob{Plane: &vision.PlaneBlob{X: 8.3, Y: 2, Near: c.near}, Features: f}
			det, ok := p.gate(vision.Result{}, b)
			require.Equal(t, c.ok, ok)
			if ok {
				assert.InDelta(t, c.near.X, det.X, 1e-9)
				assert.InDelta(t, c.near.Y, det.Y, 1e-9)
			} else {
				require.NotEmpty(t, p.notes)
				assert.True(t, p.notes[len(p.notes)-1].Outside, "counted as outside: %s", p.notes[len(p.notes)-1].Rejected)
			}
		})
	}
}

// TestGateFaintCandidate: a candidate with no cell at the threshold
// (vision.Features.Faint, found only because a tracked body was held
// there) goes on a target already in alarm that keeps still, within
// 0.2 m of it and at two thirds of a child's body or more; it never starts
// or feeds a track on its own, nor draws a moving target away.
func TestGateFaintCandidate(t *testing.T) {
	for _, c := range []struct {
		name    string
		alarmed bool
		at      [2]float64 // the candidate, m; the target is at (4, 2)
		area    float64
		ok      bool
	}{
		{"beside a target in alarm", true, [2]float64{4.1, 2}, 0.04, true},
		{"at two thirds of a child's body", true, [2]float64{4.1, 2}, 0.021, true},
		{"smaller", true, [2]float64{4.1, 2}, 0.018, false},
		{"0.3 m from the target", true, [2]float64{4.3, 2}, 0.04, false},
		{"the target is moving", true, [2]float64{4.1, 2}, 0.04, false},
		{"the track is not in alarm", false, [2]float64{4.1, 2}, 0.04, false},
	} {
		t.Run(c.name, func(t *testing.T) {
			cam := zoneCamera()
			p := newTestProcessor(t, cam)
			require.InDelta(t, 0.03, cam.Detect.MinArea, 1e-9)
			p.Tracks = []poolTrack{{ID: 7, X: 4, Y: 2}}
			if c.name == "the target is moving" {
				p.Tracks[0].VX = 0.4 // a child swimming slowly, m/s
			}
			p.alarmed[7] = c.alarmed
			f := body()
			f.Area, f.Half, f.Peak, f.Faint = c.area, c.area, 40, true
			_, ok := p.gate(vision.Result{}, vision.Blob{Plane: &vision.PlaneBlob{X: c.at[0], Y: c.at[1]}, Features: f})
			require.Equal(t, c.ok, ok)
			if !ok {
				require.NotEmpty(t, p.notes)
				assert.Contains(t, p.notes[len(p.notes)-1].Rejected, "below the threshold everywhere")
			}
			// The same candidate with a core is judged as any other.
			f.Faint = false
			_, ok = p.gate(vision.Result{}, vision.Blob{Plane: &vision.PlaneBlob{X: c.at[0], Y: c.at[1]}, Features: f})
			assert.True(t, ok)
		})
	}
}

// openWaterBlob is a 16-pixel square blob at pixel (300, 200): pool metre
// (4, 2) under zoneCamera's corners, in open water.
func openWaterBlob() vision.Blob {
	return vision.Blob{
		Centroid: vision.Point{X: 300, Y: 200},
		Box:      image.Rect(292, 192, 308, 208),
		Contour:  []vision.Point{{X: 292.5, Y: 192.5}, {X: 307.5, Y: 192.5}, {X: 307.5, Y: 207.5}, {X: 292.5, Y: 207.5}},
	}
}

// TestFrozenPictureStartsNoTarget: while the picture checks find the
// picture frozen, a blob that would alarm starts no target; once the
// picture moves again it does, and a target already raised goes on
// through a later freeze.
func TestFrozenPictureStartsNoTarget(t *testing.T) {
	blob := openWaterBlob()
	cam := zoneCamera()
	cam.Detect.Method = "mog2"
	p := newTestProcessor(t, cam)
	starts := func(from, to int) (n int) {
		for i := from; i < to; i++ {
			out, _ := p.Step(vision.Result{Index: i, Media: time.Duration(i) * 100 * time.Millisecond, Blobs: []vision.Blob{blob}}, true)
			for _, m := range out {
				if m.Kind == alert.KindTarget && strings.Contains(string(m.Data), `"event":"start"`) {
					n++
				}
			}
		}
		return n
	}
	p.Frozen = true
	assert.Zero(t, starts(0, 30), "3 s of a frozen picture")
	p.Frozen = false
	assert.Equal(t, 1, starts(30, 50), "the picture moves again")
	p.Frozen = true
	assert.Zero(t, starts(50, 70))
	require.Len(t, p.Tracks, 1)
	assert.True(t, p.alarmed[p.Tracks[0].ID], "the raised target goes on through the freeze")
}

// TestTrackBornInStillWaterWaits: a track whose run began after the water
// stopped moving starts no target for the first stillHold (3 s) of the
// stillness, then does; a track that began before the water stopped starts
// one after persist as always.
func TestTrackBornInStillWaterWaits(t *testing.T) {
	blob := openWaterBlob()
	cam := zoneCamera()
	cam.Detect.Method = "mog2"
	for _, tc := range []struct {
		name      string
		stillFrom time.Duration // the water still from here on
		wantStart time.Duration // media time of the target's start
	}{
		{"born after the water stopped", 0, 3 * time.Second},
		{"born before the water stopped", 500 * time.Millisecond, 700 * time.Millisecond},
		{"born long into the stillness", -5 * time.Second, 700 * time.Millisecond},
	} {
		t.Run(tc.name, func(t *testing.T) {
			p := newTestProcessor(t, cam)
			got := time.Duration(-1)
			for i := 0; i < 50 && got < 0; i++ {
				at := time.Duration(i) * 100 * time.Millisecond
				p.Still, p.StillSince = at >= tc.stillFrom, tc.stillFrom
				out, _ := p.Step(vision.Result{Index: i, Media: at, Blobs: []vision.Blob{blob}}, true)
				for _, m := range out {
					if m.Kind == alert.KindTarget && strings.Contains(string(m.Data), `"event":"start"`) {
						got = at
					}
				}
			}
			assert.Equal(t, tc.wantStart, got)
		})
	}
}

// TestExplainHeldByAStillOrFrozenPicture: replay -v says why a track is
// held back by the picture checks.
func TestExplainHeldByAStillOrFrozenPicture(t *testing.T) {
	blob := openWaterBlob()
	blob.Plane = &vision.PlaneBlob{X: 4, Y: 2} // the same place, for the judge
	blob.Features = body()                     // passes every rule of the judge
	cam := zoneCamera()
	for _, tc := range []struct {
		name   string
		frozen bool
		want   string
	}{
		{"still", false, "began after the water stopped moving 1.00 s ago"},
		{"frozen", true, "the picture is reported frozen"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			p := newTestProcessor(t, cam)
			p.Still, p.StillSince, p.Frozen = true, 0, tc.frozen
			var r vision.Result
			for i := 0; i <= 10; i++ {
				r = vision.Result{Index: i, Media: time.Duration(i) * 100 * time.Millisecond, Blobs: []vision.Blob{blob}}
				p.Step(r, true)
			}
			require.Len(t, p.Tracks, 1)
			occ := &synth.Occupation{X: p.Tracks[0].X, Y: p.Tracks[0].Y}
			got, reported := (&explainer{far: 1}).why(p, r, occ, true)
			assert.False(t, reported)
			assert.Contains(t, got, tc.want)
		})
	}
}

// TestReported: a track is reported at its judged position moved by its
// candidate's shift (vision.Features.ShiftX, ShiftY); a track of the
// mixture-model detectors, whose features are zero, where it is judged.
func TestReported(t *testing.T) {
	for _, tc := range []struct {
		name   string
		tr     poolTrack
		wx, wy float64
	}{
		{"shifted", poolTrack{X: 2.14, Y: 1, Features: vision.Features{ShiftX: -0.14, ShiftY: 0.02}}, 2.0, 1.02},
		{"no features", poolTrack{X: 3, Y: 4}, 3, 4},
	} {
		t.Run(tc.name, func(t *testing.T) {
			at := Reported(tc.tr)
			assert.InDelta(t, tc.wx, at.X, 1e-12)
			assert.InDelta(t, tc.wy, at.Y, 1e-12)
		})
	}
}
