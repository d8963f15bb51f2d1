package main

import (
	"encoding/json"
	"os/exec"
	"path/filepath"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/demo"
	"stillwater/vision/refdata"
	"stillwater/vision/synth"
)

// TestPictureFaults plays, in real time, 5 s of a normal generated pool
// scene followed by a bad picture, and checks what a subscriber gets: the
// fault of that kind within 5 s of the picture going bad, and no other
// fault. The bad pictures are made by ffmpeg: a black frame (lens covered
// in the dark), a flat grey frame (a towel over the camera) and the last
// frame of the scene repeated (a frozen encoder).
func TestPictureFaults(t *testing.T) {
	if testing.Short() {
		t.Skip("plays three 11 s clips in real time")
	}
	truth, scene, dir := renderScene(t, "calm", 5, func(s *synth.Scene) { s.Duration = 5 })
	size := "640x480"
	const onset, bad = 5 * time.Second, 6

	tests := []struct {
		name   string
		filter []string // ffmpeg arguments that append the bad picture
		fault  string
	}{
		{"black", []string{"-f", "lavfi", "-i", "color=c=black:s=" + size + ":r=10:d=6",
			"-filter_complex", "[0:v][1:v]concat=n=2:v=1[v]", "-map", "[v]"}, alert.FaultCameraBlinded},
		{"towel", []string{"-f", "lavfi", "-i", "color=c=0x7a7a7a:s=" + size + ":r=10:d=6",
			"-filter_complex", "[0:v][1:v]concat=n=2:v=1[v]", "-map", "[v]"}, alert.FaultCameraBlinded},
		{"frozen", []string{"-vf", "tpad=stop_mode=clone:stop_duration=6"}, alert.FaultCameraFrozen},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			clip := filepath.Join(dir, tt.name+".avi")
			args := append([]string{"-nostdin", "-loglevel", "error", "-y", "-i", scene}, tt.filter...)
			args = append(args, "-r", "10", "-c:v", "mjpeg", "-q:v", "3", clip)
			out, err := exec.Command("ffmpeg", args...).CombinedOutput()
			require.NoError(t, err, "ffmpeg (deploy/setup installs it): %s", out)

			cfg := demo.Config(truth, clip, dir, true)
			cfg.DataDir = filepath.Join(dir, tt.name)
			require.NoError(t, cfg.Validate())
			log, stop := startDaemon(t, cfg)
			start := time.Now()
			var got alert.Fault
			var at time.Time
			require.Eventually(t, func() bool {
				for _, m := range log.bySubject("stillwater.demo.fault") {
					if json.Unmarshal(m.Data, &got) == nil && got.Active {
						at = m.At
						return true
					}
				}
				return false
			}, onset+bad*time.Second+5*time.Second, 50*time.Millisecond, "no fault for a %s picture", tt.name)
			require.NoError(t, stop())
			delay := at.Sub(start) - onset
			refdata.Report(t, "picture fault %s: %s %.2f s after the picture went bad (limit 5 s): %s", tt.name, got.Fault, delay.Seconds(), got.Message)
			assert.Equal(t, tt.fault, got.Fault)
			assert.LessOrEqual(t, delay, 5*time.Second)
			for _, m := range log.bySubject("stillwater.demo.fault") {
				var f alert.Fault
				require.NoError(t, json.Unmarshal(m.Data, &f))
				assert.Equal(t, tt.fault, f.Fault, "another fault was raised too")
			}
		})
	}
}
