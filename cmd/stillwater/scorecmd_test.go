package main

import (
	"bytes"
	"encoding/json"
	"os"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/tuning"
)

// replayTarget is a replay line for a target message at frame f (10 fps),
// as stillwater replay writes it.
func replayTarget(t *testing.T, f, track int, event string, x, y float64) tuning.ReplayLine {
	t.Helper()
	b, err := alert.Encode(alert.Target{V: alert.Version, Kind: alert.KindTarget, Camera: "clip", Track: track, Event: event,
		Frame: f, Surface: alert.Position{X: x, Y: y}, Area: 0.04})
	require.NoError(t, err)
	return tuning.ReplayLine{Subject: "stillwater.clip.target", Frame: f, Media: float64(f) / 10, Msg: b}
}

// TestRunScoreFiles runs the score command on a replay and a label file.
func TestRunScoreFiles(t *testing.T) {
	dir := t.TempDir()
	var rb bytes.Buffer
	enc := json.NewEncoder(&rb)
	for _, l := range []tuning.ReplayLine{replayTarget(t, 87, 2, "start", 2.1, 1), replayTarget(t, 97, 3, "start", 4, 1)} {
		require.NoError(t, enc.Encode(l))
	}
	rp := filepath.Join(dir, "r.jsonl")
	require.NoError(t, os.WriteFile(rp, rb.Bytes(), 0o644))
	// A hand-written label file: format, fps, frames and presence only.
	lp := filepath.Join(dir, "l.json")
	require.NoError(t, os.WriteFile(lp, []byte(`{"format":"stillwater.labels/v1","fps":10,"frames":200,"presence":[{"from_s":8,"to_s":16}]}`), 0o644))

	tests := []struct {
		name    string
		args    []string
		wantErr string
	}{
		{"no limits", []string{rp, lp}, ""},
		{"delay met", []string{"-max-delay", "1s", rp, lp}, ""},
		// Without positions the 4 m start counts as the intruder's track (a
		// second id: one break), not as a false alarm.
		{"breaks", []string{"-max-breaks", "0", rp, lp}, "1 track breaks exceed 0"},
		{"delay missed", []string{"-max-delay", "500ms", rp, lp}, "worst first-alert delay 0.70 s exceeds 500ms"},
		{"odd args", []string{rp}, "usage"},
		{"bad labels", []string{rp, rp}, "read labels"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			var out, errb bytes.Buffer
			err := runScore(t.Context(), tt.args, &out, &errb)
			if tt.wantErr == "" {
				require.NoError(t, err)
				assert.Contains(t, out.String(), "1/1")
				return
			}
			require.Error(t, err)
			assert.Contains(t, err.Error(), tt.wantErr)
		})
	}
}
