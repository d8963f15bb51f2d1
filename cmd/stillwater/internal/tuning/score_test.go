package tuning

import (
	"fmt"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/vision/synth"
)

// targetLine is a replay line for a target message at frame f (10 fps).
func targetLine(t *testing.T, f, track int, event string, x, y float64) ReplayLine {
	t.Helper()
	b, err := alert.Encode(alert.Target{V: alert.Version, Kind: alert.KindTarget, Camera: "clip", Track: track, Event: event,
		Frame: f, Surface: alert.Position{X: x, Y: y}, Area: 0.04})
	require.NoError(t, err)
	return ReplayLine{Subject: "stillwater.clip.target", Frame: f, Media: float64(f) / 10, Msg: b}
}

func clearedLine(t *testing.T, f, track int) ReplayLine {
	t.Helper()
	b, err := alert.Encode(alert.Cleared{V: alert.Version, Kind: alert.KindCleared, Camera: "clip", Track: track, Frame: f})
	require.NoError(t, err)
	return ReplayLine{Subject: "stillwater.clip.cleared", Frame: f, Media: float64(f) / 10, Msg: b}
}

// handTruth is a 20 s clip at 10 fps with an intruder at (2, 1) m from 8 s
// to 16 s; withFrames adds the per-frame positions.
func handTruth(withFrames bool) synth.Truth {
	t := synth.Truth{Format: synth.LabelFormat, FPS: 10, Frames: 200, Presence: []synth.Presence{{From: 8, To: 16}}}
	if withFrames {
		for f := 0; f < 200; f++ {
			ft := synth.FrameTruth{Frame: f, T: float64(f) / 10}
			if f >= 80 && f < 160 {
				ft.Intruder = &synth.Occupation{X: 2, Y: 1, Area: 0.04}
			}
			t.PerFrame = append(t.PerFrame, ft)
		}
	}
	return t
}

func TestScoreClip(t *testing.T) {
	tests := []struct {
		name   string
		lines  func(t *testing.T) []ReplayLine
		frames bool
		want   ClipScore
	}{
		{
			// Worked by hand:
			//  3.0 s start track 1 at (5,3): nobody in the water → false 1
			//  3.5 s update track 1: belongs to a false track, ignored
			//  8.7 s start track 2 at (2.1,1): 0.1 m from the intruder →
			//        detected, delay 8.7 − 8 = 0.7 s, error 0.1
			//  9.2 s update track 2 at (2,1.2): error 0.2
			//  9.7 s start track 3 at (4,1): 2 m from the intruder > 1 m → false 2
			// 10.0 s cleared track 2 while the intruder is in → break 1
			// 10.5 s start track 4 at (2,1.3): error 0.3; ids {2,4} → break 2
			// Free footage 20 − 8 = 12 s. Longest unbroken run: track 2,
			// 8.7–9.2 s = 0.5 s.
			name: "labelled positions",
			lines: func(t *testing.T) []ReplayLine {
				return []ReplayLine{
					targetLine(t, 30, 1, "start", 5, 3),
					targetLine(t, 35, 1, "update", 5, 3),
					targetLine(t, 87, 2, "start", 2.1, 1),
					targetLine(t, 92, 2, "update", 2, 1.2),
					targetLine(t, 97, 3, "start", 4, 1),
					clearedLine(t, 100, 2),
					targetLine(t, 105, 4, "start", 2, 1.3),
				}
			},
			frames: true,
			want: ClipScore{Name: "c", Duration: 20, FreeHours: 12.0 / 3600, Presences: 1, Detected: 1,
				Delays: []float64{0.7}, False: 2, Errors: []float64{0.1, 0.2, 0.3}, Breaks: 2, Tracked: 0.5},
		},
		{
			// Presence only, as written by hand for a real clip:
			//  9.0 s start track 1 → detected, delay 1.0 s; no position to
			//        compare with
			//  9.5 s and 10.0 s updates, then 16.5 s (within the 1 s grace):
			//        one track; the 6.5 s silence breaks the run, so the
			//        longest unbroken run is 9.0–10.0 = 1.0 s
			// 17.5 s start track 5: after 16 s + 1 s grace → false
			name: "presence only",
			lines: func(t *testing.T) []ReplayLine {
				return []ReplayLine{
					targetLine(t, 90, 1, "start", 2, 1),
					targetLine(t, 95, 1, "update", 2, 1),
					targetLine(t, 100, 1, "update", 2, 1),
					targetLine(t, 165, 1, "update", 2, 1),
					targetLine(t, 175, 5, "start", 6, 3),
				}
			},
			want: ClipScore{Name: "c", Duration: 20, FreeHours: 12.0 / 3600, Presences: 1, Detected: 1,
				Delays: []float64{1.0}, False: 1, Tracked: 1.0},
		},
		{
			name:  "missed",
			lines: func(t *testing.T) []ReplayLine { return nil },
			want:  ClipScore{Name: "c", Duration: 20, FreeHours: 12.0 / 3600, Presences: 1},
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, err := scoreClip("c", tt.lines(t), handTruth(tt.frames), DefaultScoreRules())
			require.NoError(t, err)
			assert.Equal(t, tt.want.Presences, got.Presences)
			assert.Equal(t, tt.want.Detected, got.Detected)
			assert.Equal(t, tt.want.False, got.False)
			assert.Equal(t, tt.want.Breaks, got.Breaks)
			assert.InDelta(t, tt.want.Duration, got.Duration, 1e-9)
			assert.InDelta(t, tt.want.FreeHours, got.FreeHours, 1e-12)
			assert.InDelta(t, tt.want.Tracked, got.Tracked, 1e-9)
			assert.InDeltaSlice(t, tt.want.Delays, got.Delays, 1e-9)
			assert.InDeltaSlice(t, tt.want.Errors, got.Errors, 1e-9)
			// Each scored message keeps its track and both positions.
			require.Len(t, got.Misses, len(got.Errors))
			for i, m := range got.Misses {
				assert.InDelta(t, got.Errors[i], math.Hypot(m.At[0]-m.Label[0], m.At[1]-m.Label[1]), 1e-9)
				assert.Equal(t, got.Errors[i], m.Err)
			}
			if tt.frames {
				assert.Equal(t, []int{2, 2, 4}, []int{got.Misses[0].Track, got.Misses[1].Track, got.Misses[2].Track})
				assert.Equal(t, 105, got.Misses[2].Frame)
			}
		})
	}
}

func TestScoreTotals(t *testing.T) {
	// Errors 0.1, 0.2, 0.3: median 0.2; p95 at rank 0.95·2 = 1.9, so
	// 0.2 + 0.9·(0.3 − 0.2) = 0.29 (linear interpolation between order
	// statistics). Two false alarms in 12 s are 600 per hour.
	c := ClipScore{Presences: 1, Detected: 1, Delays: []float64{0.7}, False: 2, FreeHours: 12.0 / 3600, Errors: []float64{0.3, 0.1, 0.2}, Breaks: 2}
	tot := TotalOf([]ClipScore{c})
	assert.InDelta(t, 0.2, Quantile(tot.Errors, 0.5), 1e-12)
	assert.InDelta(t, 0.29, Quantile(tot.Errors, 0.95), 1e-12)
	assert.InDelta(t, 600, tot.falsePerHour(), 1e-9)
	assert.True(t, math.IsNaN(Quantile(nil, 0.5)))

	tests := []struct {
		name string
		lim  ScoreLimits
		want int // broken limits
	}{
		{"none set", ScoreLimits{MaxDelay: -1, MaxFalse: -1, MaxP95: -1, MaxBreaks: -1}, 0},
		{"delay", ScoreLimits{MaxDelay: 500 * time.Millisecond, MaxFalse: -1, MaxP95: -1, MaxBreaks: -1}, 1},
		{"delay met", ScoreLimits{MaxDelay: time.Second, MaxFalse: -1, MaxP95: -1, MaxBreaks: -1}, 0},
		{"false", ScoreLimits{MaxDelay: -1, MaxFalse: 0, MaxP95: -1, MaxBreaks: -1}, 1},
		{"p95", ScoreLimits{MaxDelay: -1, MaxFalse: -1, MaxP95: 0.25, MaxBreaks: -1}, 1},
		{"all", ScoreLimits{MaxDelay: 0, MaxFalse: 0, MaxP95: 0, MaxBreaks: 0}, 4},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			assert.Len(t, tt.lim.Check(tot), tt.want)
		})
	}
	missed := TotalOf([]ClipScore{{Presences: 2, Detected: 1}})
	assert.Len(t, ScoreLimits{MaxDelay: -1, MaxFalse: -1, MaxP95: -1, MaxBreaks: -1}.Check(missed), 1, "a missed intruder always fails")
}

func TestReadReplayErrors(t *testing.T) {
	_, err := ReadReplay(strings.NewReader("{\"subject\":\"a\",\"msg\":{}}\nnot json\n"), "x.jsonl")
	require.Error(t, err)
	assert.Contains(t, err.Error(), "x.jsonl:2")
	_, err = ReadReplay(strings.NewReader(`{"subject":"a"}`), "y.jsonl")
	assert.ErrorContains(t, err, fmt.Sprintf("%s:1: no msg", "y.jsonl"))
}

// faultLine is a replay line for a fault message at frame f (10 fps).
func faultLine(t *testing.T, f int, kind string, active bool) ReplayLine {
	t.Helper()
	b, err := alert.Encode(alert.NewFault("clip", uint64(f), replayEpoch(), kind, active, ""))
	require.NoError(t, err)
	return ReplayLine{Subject: "stillwater.clip.fault", Frame: f, Media: float64(f) / 10, Msg: b}
}

func TestScoreFaults(t *testing.T) {
	// A 30 s clip at 10 fps, nobody in the water, the picture frozen from
	// 10 to 20 s and black from 24 to 27 s. Worked by hand:
	//   5.0 s camera_lost: not a picture fault, ignored
	//  12.3 s camera_frozen raised during the frozen fault: raised, 2.3 s
	//  13.0 s a target starts: false alarm, and a target during a fault
	//  15.0 s camera_frozen cleared while the picture is still frozen: a
	//         fault break
	//  16.0 s camera_frozen raised again: the fault's delay stays 2.3 s
	//  22.6 s camera_frozen cleared after the fault ended: no break
	//  25.5 s camera_noise raised during the black fault: the wrong kind,
	//         a fault raised with none of its kind labelled (1)
	//  28.0 s camera_blinded raised after the black fault ended (2)
	// The black fault never raised camera_blinded while it was on.
	truth := synth.Truth{Format: synth.LabelFormat, FPS: 10, Frames: 300,
		Faults: []synth.Fault{{Kind: synth.FaultFrozen, From: 10, To: 20}, {Kind: synth.FaultBlack, From: 24, To: 27}}}
	lines := func(t *testing.T) []ReplayLine {
		return []ReplayLine{
			faultLine(t, 50, alert.FaultCameraLost, true),
			faultLine(t, 123, alert.FaultCameraFrozen, true),
			targetLine(t, 130, 1, "start", 2, 1),
			faultLine(t, 150, alert.FaultCameraFrozen, false),
			faultLine(t, 160, alert.FaultCameraFrozen, true),
			faultLine(t, 226, alert.FaultCameraFrozen, false),
			faultLine(t, 255, alert.FaultCameraNoise, true),
			faultLine(t, 280, alert.FaultCameraBlinded, true),
		}
	}
	got, err := scoreClip("c", lines(t), truth, DefaultScoreRules())
	require.NoError(t, err)
	assert.Equal(t, 2, got.FaultsLabelled)
	assert.Equal(t, 1, got.FaultsRaised)
	assert.InDeltaSlice(t, []float64{2.3}, got.FaultDelays, 1e-9)
	assert.Equal(t, 2, got.FalseFaults)
	assert.Equal(t, 1, got.FaultTargets)
	assert.Equal(t, 1, got.FaultBreaks)
	assert.Equal(t, 1, got.False)

	tot := TotalOf([]ClipScore{got})
	none := ScoreLimits{MaxDelay: -1, MaxFalse: -1, MaxP95: -1, MaxBreaks: -1, MaxFaultDelay: -1, MaxFalseFaults: -1, MaxFaultTargets: -1}
	assert.Empty(t, none.Check(tot))
	lim := none
	lim.MaxFaultDelay = 3 * time.Second
	assert.Equal(t, []string{"1 of 2 labelled picture faults never raised their fault"}, lim.Check(tot))
	lim.MaxFaultDelay = 2 * time.Second
	assert.Len(t, lim.Check(tot), 2, "and 2.3 s is late")
	lim = none
	lim.MaxFalseFaults, lim.MaxFaultTargets = 0, 0
	assert.Equal(t, []string{"2 picture faults raised with none labelled exceed 0", "1 targets raised during a picture fault exceed 0"}, lim.Check(tot))

	var sb strings.Builder
	WriteScores(&sb, []ClipScore{got})
	assert.Contains(t, sb.String(), "picture faults: 1 of 2 raised, delay median 2.30 s, worst 2.30 s; 2 raised with none labelled; 1 targets while a fault was on; 1 cleared while the fault was still on")

	truth.Faults = []synth.Fault{{Kind: "smoke", From: 1, To: 2}}
	_, err = scoreClip("c", nil, truth, DefaultScoreRules())
	assert.ErrorContains(t, err, `labelled fault "smoke"`)
}
