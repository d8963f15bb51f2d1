package main

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"stillwater/alert"
	"stillwater/cmd/stillwater/internal/pipeline"
	"stillwater/cmd/stillwater/internal/tuning"
	"stillwater/vision"
	"stillwater/vision/refdata"
	"stillwater/vision/synth"
)

// TestPictureFaultsOneCodePath: the daemon's picture checks and replay's
// are the same pictureFaults; here its raise, clear and armed rules.
func TestPictureFaultsOneCodePath(t *testing.T) {
	ok := vision.HealthStats{Mean: 120, Spread: 30, HasPrev: true, Diff: 1, HasMotion: true, Motion: 1, Correlation: 0.9}
	dark := vision.HealthStats{Mean: 2, Spread: 1, HasPrev: true, HasMotion: true, Correlation: 0.1}
	p := pipeline.NewPictureFaults(vision.HealthConfig{})
	var got []string
	step := func(from, to time.Duration, s vision.HealthStats, armed bool) {
		for at := from; at < to; at += 100 * time.Millisecond {
			for _, c := range p.Observe(at, s, armed) {
				got = append(got, fmt.Sprintf("%v %s %v", at, c.Kind, c.Active))
			}
		}
	}
	step(0, time.Second, ok, true)
	step(time.Second, 5*time.Second, dark, false) // dark while disarmed: nothing raised
	step(5*time.Second, 7*time.Second, dark, true)
	step(7*time.Second, 10*time.Second, ok, false) // the picture returns: cleared even when disarmed
	assert.Equal(t, []string{"5s camera_blinded true", "9s camera_blinded false"}, got)
}

// faultClip is a generated clip with a stretch of bad picture, encoded.
type faultClip struct {
	name  string
	codec []string // ffmpeg output options
	kind  string   // synth fault kind
}

// makeFaultClip takes the rendered clip src (fps frames a second), keeps
// its first onset seconds, then dur seconds of a bad picture, then the
// rest of src, and encodes the whole through ffmpeg with the clip's codec
// options. A frozen picture is src's last frame before onset repeated: the
// encoder re-codes it at each key frame, as a camera whose picture stuck
// does.
func makeFaultClip(t *testing.T, src, dst string, fc faultClip, w, h int, fps, onset, dur float64) {
	t.Helper()
	f := int(onset * fps)
	head := fmt.Sprintf("[0]trim=end_frame=%d,setpts=PTS-STARTPTS", f)
	tail := fmt.Sprintf("[0]trim=start_frame=%d,setpts=PTS-STARTPTS[b]", f)
	var graph string
	switch fc.kind {
	case synth.FaultFrozen:
		graph = fmt.Sprintf("%s,tpad=stop_mode=clone:stop_duration=%g[a];%s;[a][b]concat=n=2[v]", head, dur, tail)
	case synth.FaultBlack:
		// A covered lens: black with a sensor's few grey levels of noise.
		graph = fmt.Sprintf("%s[a];color=c=black:s=%dx%d:r=%g:d=%g,format=yuv420p,noise=alls=8:allf=t[k];%s;[a][k][b]concat=n=3[v]", head, w, h, fps, dur, tail)
	case synth.FaultNoise:
		// A failing sensor or cable: strong random snow on grey.
		graph = fmt.Sprintf("%s[a];color=c=gray:s=%dx%d:r=%g:d=%g,format=yuv420p,noise=alls=100:allf=t+u[k];%s;[a][k][b]concat=n=3[v]", head, w, h, fps, dur, tail)
	default:
		t.Fatalf("fault kind %q", fc.kind)
	}
	args := []string{"-nostdin", "-loglevel", "error", "-y", "-i", src, "-filter_complex", graph, "-map", "[v]", "-pix_fmt", "yuv420p"}
	args = append(append(args, fc.codec...), dst)
	out, err := exec.Command("ffmpeg", args...).CombinedOutput()
	require.NoError(t, err, "ffmpeg (deploy/setup installs it): %s", out)
}

// TestReplayRaisesPictureFaults: a generated pool clip whose picture
// freezes for 8 s, encoded as a camera would (MPEG-4 part 2 with the mp4v
// tag, and H.264 by libx264, each with a key frame every 1 s and every
// 2 s, so the frozen picture is re-coded at each key frame), raises
// camera_frozen within 3 s of the freeze, and no target while frozen; a
// black and a snowy stretch through H.264 raise camera_blinded and
// camera_noise likewise. No other picture fault is raised. Replay
// writes the faults; the score reads them.
func TestReplayRaisesPictureFaults(t *testing.T) {
	if testing.Short() {
		t.Skip("renders, encodes and replays eight 28 s clips")
	}
	truth, src, dir := renderScene(t, "calm", 11, nil)
	const fps, onset, dur = 10, 8.0, 8.0
	var clips []faultClip
	for _, gop := range []int{1, 2} {
		g := fmt.Sprint(gop * fps)
		clips = append(clips,
			faultClip{fmt.Sprintf("frozen mp4v gop %d s", gop), []string{"-c:v", "mpeg4", "-tag:v", "mp4v", "-q:v", "5", "-g", g, "-f", "mp4"}, synth.FaultFrozen},
			faultClip{fmt.Sprintf("frozen h264 gop %d s", gop), []string{"-c:v", "libx264", "-crf", "26", "-g", g, "-f", "mp4"}, synth.FaultFrozen},
			// A constant 1 Mbit/s, as many cameras send: the encoder keeps
			// refining the frozen picture between key frames.
			faultClip{fmt.Sprintf("frozen h264 1 Mbit/s gop %d s", gop), []string{"-c:v", "libx264", "-b:v", "1M", "-maxrate", "1M", "-bufsize", "1M", "-g", g, "-f", "mp4"}, synth.FaultFrozen},
		)
	}
	clips = append(clips,
		faultClip{"black h264 gop 2 s", []string{"-c:v", "libx264", "-crf", "26", "-g", "20", "-f", "mp4"}, synth.FaultBlack},
		faultClip{"noise h264 gop 2 s", []string{"-c:v", "libx264", "-crf", "26", "-g", "20", "-f", "mp4"}, synth.FaultNoise},
	)
	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	var scores []tuning.ClipScore
	for i, fc := range clips {
		t.Run(fc.name, func(t *testing.T) {
			clip := filepath.Join(dir, fmt.Sprintf("fault%d.mp4", i))
			makeFaultClip(t, src, clip, fc, truth.Width, truth.Height, fps, onset, dur)
			cam, err := tuning.CameraFromLabels(truth, clip)
			require.NoError(t, err)
			lt := synth.Truth{Format: synth.LabelFormat, FPS: fps, Frames: truth.Frames + int(dur*fps),
				Faults: []synth.Fault{{Kind: fc.kind, From: onset, To: onset + dur}}}
			cs, st, err := tuning.ReplayScore(context.Background(), tuning.ClipJob{Name: fc.name, Clip: clip, Truth: lt}, cam, tuning.DefaultScoreRules(), log)
			require.NoError(t, err)
			require.Equal(t, lt.Frames, st.Frames, "frames replayed")
			scores = append(scores, cs)
			require.Equal(t, 1, cs.FaultsRaised, "the %s picture raised no %s fault", fc.kind, mustFaultKind(t, fc.kind))
			refdata.Report(t, "replay: %s: %s raised %.1f s after onset; %d other picture faults; %d targets during the fault, %d false targets in all",
				fc.name, mustFaultKind(t, fc.kind), cs.FaultDelays[0], cs.FalseFaults, cs.FaultTargets, cs.False)
			assert.LessOrEqual(t, cs.FaultDelays[0], 3.0, "fault delay, s")
			assert.Zero(t, cs.FalseFaults, "picture faults raised outside the labelled one")
			assert.Zero(t, cs.FaultTargets, "targets while the picture was bad")
		})
	}
	var sb strings.Builder
	tuning.WriteScores(&sb, scores)
	t.Log("\n" + sb.String())
}

func mustFaultKind(t *testing.T, label string) string {
	t.Helper()
	k, err := tuning.FaultKindOf(label)
	require.NoError(t, err)
	return k
}

// TestReplayWritesFaultMessages: replay's output carries the fault raise
// and clear as the daemon's fault messages on PREFIX.clip.fault.
func TestReplayWritesFaultMessages(t *testing.T) {
	truth, src, dir := renderScene(t, "calm", 12, func(s *synth.Scene) { s.Duration = 10 })
	clip := filepath.Join(dir, "frozen.mp4")
	makeFaultClip(t, src, clip, faultClip{"frozen", []string{"-c:v", "libx264", "-crf", "26", "-g", "10", "-f", "mp4"}, synth.FaultFrozen}, truth.Width, truth.Height, 10, 3, 5)
	cam, err := tuning.CameraFromLabels(truth, clip)
	require.NoError(t, err)
	var sb strings.Builder
	_, err = tuning.ReplayClip(context.Background(), cam, "pool", &sb, slog.New(slog.NewTextHandler(io.Discard, nil)))
	require.NoError(t, err)
	lines, err := tuning.ReadReplay(strings.NewReader(sb.String()), "replay")
	require.NoError(t, err)
	var faults []alert.Fault
	for _, l := range lines {
		if l.Subject != "pool.clip.fault" {
			continue
		}
		var f alert.Fault
		require.NoError(t, json.Unmarshal(l.Msg, &f), "fault message %s", l.Msg)
		faults = append(faults, f)
	}
	require.Len(t, faults, 2, "one raise and one clear: %s", sb.String())
	assert.Equal(t, alert.FaultCameraFrozen, faults[0].Fault)
	assert.True(t, faults[0].Active)
	assert.Equal(t, alert.FaultCameraFrozen, faults[1].Fault)
	assert.False(t, faults[1].Active)
	assert.Less(t, faults[0].Seq, faults[1].Seq)
}
